"""Model-path benchmark: vectors/s through one entity's full detector.

Run:  python tests/benchmarks/bench_model.py [--quick] [--batch B] [--per-call]

For n in {50, 200, 1000} metrics (rank-8 shared movement plus noise, a few
persistent shifts), it times ``EntityDetector.process`` over micro-batches
after warm-up — normalise, projected LASSO, debias, decide, learn — and
prints vectors/s and microseconds per vector, plus the share of vectors the
solver finished without iterating.  ``--per-call`` adds the cost of one
``process`` call at n = 200 for the small micro-batches a live service sees
(1, 8, 64, 256 vectors), where the fixed per-call cost dominates.  Single
process, single thread of numpy work dominates (set OPENBLAS_NUM_THREADS=1 to
pin it to one core).  Figures only; nothing is asserted about speed.
"""

from __future__ import annotations

import argparse
import sys
import time

import numpy as np

from shiftsieve.models.detector import DetectorConfig, EntityDetector


def stream(rng: np.random.Generator, n: int, r: int, samples: int) -> np.ndarray:
    loadings = rng.standard_normal((n, r)) * 3.0
    X = 100.0 + rng.standard_normal((samples, r)) @ loadings.T + rng.standard_normal((samples, n))
    for start in range(samples // 3, samples, samples // 4):   # a few persistent shifts
        cols = rng.choice(n, 3, replace=False)
        X[start:start + 200, cols] += 8.0
    return X


def measure(n: int, batch: int, batches: int, seed: int = 0) -> dict:
    rng = np.random.default_rng(seed)
    warmup = 300
    X = stream(rng, n, 8, warmup + batch * batches)
    det = EntityDetector(n, np.zeros(n, bool), DetectorConfig(warmup=warmup, rank=8))
    det.process(X[:warmup], np.arange(warmup, dtype=float))
    ts = np.arange(X.shape[0], dtype=float)
    zero_iter = 0
    started = time.perf_counter()
    for start in range(warmup, X.shape[0], batch):
        out = det.process(X[start:start + batch], ts[start:start + batch])
        zero_iter += int(np.count_nonzero(out.n_iter == 0))
    seconds = time.perf_counter() - started
    vectors = X.shape[0] - warmup
    return {"n": n, "batch": batch, "vectors": vectors, "seconds": seconds,
            "rate": vectors / seconds, "us_per_vector": 1e6 * seconds / vectors,
            "zero_iteration_share": zero_iter / vectors}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="tiny run (smoke test)")
    parser.add_argument("--batch", type=int, default=256, help="vectors per micro-batch")
    parser.add_argument("--repeat", type=int, default=5, help="runs per size; best and median are printed")
    parser.add_argument("--per-call", action="store_true", help="also ms per process() call at n = 200, B = 1..256")
    args = parser.parse_args(argv)
    batches, repeat = (2, 1) if args.quick else (40, args.repeat)
    print(f"model path, rank 8, micro-batch {args.batch}, default detector settings, "
          f"{repeat} run(s) per size (best = least disturbed by the rest of the machine)")
    print(f"{'n':>6s} {'best vec/s':>12s} {'median vec/s':>13s} {'best us/vec':>12s} {'0-iteration':>12s}")
    for n in (50, 200, 1000):
        runs = [measure(n, args.batch, batches if n < 1000 else max(batches // 4, 1), seed=0)
                for _ in range(repeat)]
        rates = sorted(m["rate"] for m in runs)
        print(f"{n:6d} {rates[-1]:12,.0f} {rates[len(rates) // 2]:13,.0f} {1e6 / rates[-1]:12.1f} "
              f"{runs[0]['zero_iteration_share']:11.0%}")
    if args.per_call:
        print(f"\nper process() call at n = 200 ({repeat} run(s), best)\n{'batch':>6s} {'ms/call':>9s} {'vec/s':>10s}")
        for batch in (1, 8, 64, 256):
            calls = batches if args.quick else max(batches, 2560 // batch)
            best = min(measure(200, batch, calls)["seconds"] for _ in range(repeat)) / calls
            print(f"{batch:6d} {1e3 * best:9.3f} {batch / best:10,.0f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())

"""Smoke test of the solver benchmark script (figures present; no timing bounds)."""

from __future__ import annotations

import importlib.util
import re
from pathlib import Path

BENCH = Path(__file__).parent / "benchmarks" / "bench_solver.py"


def _load_bench():
    spec = importlib.util.spec_from_file_location("bench_solver", BENCH)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


def test_bench_solver_runs(capsys):
    assert _load_bench().main(["--quick"]) == 0
    out = capsys.readouterr().out
    num = r"[0-9]+(?:\.[0-9]+)?"
    for label in (r"\(a\) ours warm", r"\(b\) sklearn cold", r"\(c\) ours cold"):
        assert re.search(label + r"\s+per-vector\s+" + num + r" us", out), (label, out)
    assert re.search(r"ratio sklearn-cold / ours-warm:\s+" + num + "x", out), out
    assert re.search(r"ratio sklearn-cold / ours-cold:\s+" + num + "x", out), out
    assert re.search(r"iterations: zero-iteration\s+" + num + "%", out), out
    # The benchmark's own agreement figure: same problem, same tolerance rule.
    m = re.search(r"objective \(ours - sklearn\)/sklearn on the sklearn subset: max ([-+0-9.e]+)", out)
    assert m and abs(float(m.group(1))) < 1e-4, out


def test_bench_model_runs(capsys):
    spec = importlib.util.spec_from_file_location("bench_model", BENCH.with_name("bench_model.py"))
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    assert mod.main(["--quick", "--batch", "64"]) == 0
    out = capsys.readouterr().out
    for n in (50, 200, 1000):
        assert re.search(rf"^\s+{n}\s+[0-9,]+\s+[0-9,]+\s+[0-9.]+\s+[0-9]+%$", out, re.M), (n, out)


def test_bench_service_runs(capsys, kafka_broker):
    """The end-to-end benchmark at smoke size (it starts its own broker; the fixture only makes
    the test skip, or fail under SHIFTSIEVE_REQUIRE_BROKER=1, where no broker can run)."""
    spec = importlib.util.spec_from_file_location("bench_service", BENCH.with_name("bench_service.py"))
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    assert mod.main(["--vectors", "2000", "--latency-messages", "200", "--entities", "2"]) == 0
    out = capsys.readouterr().out
    assert re.search(r"^3\. service: [0-9,]+ vectors in", out, re.M), out
    assert re.search(r"p50 [0-9.]+ ms, p99 [0-9.]+ ms", out), out
    assert "peak RSS" in out, out
    assert len(re.findall(r"^\s+(?:service >=|>= 10,000).*:\s+(?:NOT )?met \(", out, re.M)) == 2, out


def test_bench_memory_runs(capsys):
    spec = importlib.util.spec_from_file_location("bench_memory", BENCH.with_name("bench_memory.py"))
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    assert mod.main(["--entities", "300", "--cap", "100"]) == 0
    out = capsys.readouterr().out
    for config in ("(a)", "(b)", "(c)"):
        assert re.search(rf"^{re.escape(config)}\s+[0-9,]+\s+[0-9,]+\s+[0-9,]+", out, re.M), (config, out)
    assert "memory per resident entity" in out, out

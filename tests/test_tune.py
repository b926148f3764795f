"""`shiftsieve tune`: quiet-period rates, the search, the TOML fragment and the command line."""

import doctest
import json
import tomllib
from pathlib import Path

import numpy as np
import pytest
from scipy.stats import binom

import shiftsieve.stream.tune as tune_module
from shiftsieve.stream.cli import EXIT_USAGE, main
from shiftsieve.stream.config import load_config
from shiftsieve.stream.labels import load_labels
from shiftsieve.stream.scoring import predicted_incidents
from shiftsieve.stream.replay import replay
from shiftsieve.stream.tune import (EXIT_NOTHING_FITS, TuneError, format_tuning, toml_fragment, tune,
                                    with_settings)

DATA = Path(__file__).resolve().parents[1] / "replay_data"
T0, STEP, WARMUP = 1780000000.0, 30.0, 150
# Brinehaven Ferry Line names (replay_data/generate.py); no *_ms/_seconds/_bytes, so no log scale.
METRICS = ("http_req_per_s", "http_5xx_ratio", "bookings_confirmed_per_s", "seat_holds_active", "cpu_util_ratio",
           "threads_live", "db_pool_in_use", "db_transactions_per_s", "queue_depth", "payments_started_per_s",
           "cache_hit_ratio", "open_fds", "net_rx_packets_per_s", "net_tx_packets_per_s", "gc_collections_per_s",
           "vehicle_lanes_free", "manifest_rows_written_per_s", "log_lines_per_s", "retries_per_s",
           "sessions_active")
NULL_GRID = {"false_alarms": (0.03, 0.02), "confirmations": ((2, 3), (3, 5))}


def _write(path: Path, samples: int, *, seed: int, step: tuple[int, int, float] | None = None) -> Path:
    """One entity, i.i.d. N(100, 1) metrics (a null stream); `step` = (from, to, sigmas) on seat_holds_active."""
    rng = np.random.default_rng(seed)
    X = 100.0 + rng.standard_normal((samples, len(METRICS)))
    if step is not None:
        X[step[0]:step[1], METRICS.index("seat_holds_active")] += step[2]
    with open(path, "w") as f:
        for t, row in enumerate(X):
            f.write(json.dumps({"ts": T0 + STEP * t, "entity": "booking-api-1",
                                "metrics": dict(zip(METRICS, row.round(4).tolist()))}) + "\n")
    return path


@pytest.fixture(scope="module")
def config_file(tmp_path_factory) -> Path:
    path = tmp_path_factory.mktemp("tune") / "tune.toml"
    path.write_text(f"[model]\nwarmup = {WARMUP}\n")
    return path


@pytest.fixture(scope="module")
def null_input(tmp_path_factory) -> Path:
    return _write(tmp_path_factory.mktemp("tune") / "null.jsonl", 2500, seed=11)


@pytest.fixture(scope="module")
def null_search(null_input, config_file):
    """Budget 0 on a null stream: every grid setting alerts, so the search tries them all."""
    end = T0 + STEP * 2499
    return tune(null_input, load_config(config_file, environ={}), budget_per_day=0.0, quiet_until=end, **NULL_GRID)


def test_null_stream_rate_matches_the_binomial_tail(null_search):
    r = null_search
    assert r.recommended is None and len(r.candidates) == r.grid_size == 4
    # Scored days: from the first vector after warm-up (vector WARMUP, 0-based) to quiet_until.
    assert r.quiet_days == pytest.approx(STEP * (2499 - WARMUP) / 86400)
    for c in r.candidates:
        # Reference: binomial tail (scipy.stats.binom). A quiet metric is flagged with probability
        # false_alarm per sample (DEVELOPERS.md, tested in test_false_alarm.py), so a k-of-m window
        # is full on a given metric and step with P(X >= k), X ~ Binom(m, false_alarm); over 20
        # metrics and 2880 steps a day that is the expected confirmations per day. It over-counts
        # onsets (a full window stays full for a few steps; metrics joining an open incident are
        # not new incidents), so this is an order-of-magnitude check: within a factor of 3.
        expected = len(METRICS) * binom.sf(c.confirm_k - 1, c.confirm_m, c.false_alarm) * 86400 / STEP
        assert expected / 3 <= c.quiet_alerts_per_day <= 3 * expected, (c, expected)
        assert c.quiet_alerts_per_day == pytest.approx(c.quiet_alerts / r.quiet_days)
        assert not c.within_budget
    assert "no setting tried keeps alerts within 0/day" in format_tuning(r)


def test_recommendation_is_the_most_sensitive_setting_within_budget(null_input, config_file, null_search):
    config = load_config(config_file, environ={})
    end = T0 + STEP * 2499
    # Reference: exhaustive search, each grid setting replayed on its own (the definition).
    brute = []
    for c in null_search.candidates:
        events: list[dict] = []
        replay(null_input, with_settings(config, c.false_alarm, c.confirm_k, c.confirm_m),
               sinks=[events.append], progress=False)
        brute.append(sum(p.onset < end for p in predicted_incidents(events)))
    assert [c.quiet_alerts for c in null_search.candidates] == brute
    rates = [alerts / null_search.quiet_days for alerts in brute]
    budget = rates[1]   # exactly the second setting's rate: "within" includes the boundary
    first_fit = next(i for i, rate in enumerate(rates) if rate <= budget)
    assert first_fit == 1 and rates[0] > budget
    r = tune(null_input, config, budget_per_day=budget, quiet_until=end, **NULL_GRID)
    assert len(r.candidates) == first_fit + 1   # the search stops at the first fit
    pick = r.recommended
    assert pick is not None and pick.within_budget and pick.quiet_alerts_per_day <= budget
    assert (pick.false_alarm, pick.confirm_k, pick.confirm_m) == (0.03, 3, 5)
    assert r.rest_incidents == 0 and r.rest is None


def test_bundled_single_shift_is_still_detected(tmp_path):
    labels = load_labels(DATA / "single_shift.labels.json")
    r = tune(DATA / "single_shift.jsonl.gz", load_config(environ={}), budget_per_day=1.0, labels=labels)
    # Default quiet period: up to the first labelled start minus the evaluation tolerance (120 s).
    assert r.quiet_until == labels.incidents[0].start - 120.0
    assert r.recommended is not None and r.recommended.quiet_alerts_per_day <= 1.0
    # Reference: the generator's planted ground truth (the labels file): one incident, found.
    assert r.rest is not None and r.rest.labelled == 1 and r.rest.recall == 1.0
    assert r.rest_incidents == len(r.rest.predicted) >= 1
    # The fragment parses (stdlib tomllib) and passes the config schema with exactly these values.
    text = toml_fragment(r)
    assert tomllib.loads(text) == {"model": {"false_alarm": r.recommended.false_alarm},
                                   "decision": {"confirm_k": r.recommended.confirm_k,
                                                "confirm_m": r.recommended.confirm_m}}
    fragment = tmp_path / "tuned.toml"
    fragment.write_text(text)
    loaded = load_config(fragment, environ={})
    assert (loaded.model.false_alarm, loaded.decision.confirm_k, loaded.decision.confirm_m) == \
        (r.recommended.false_alarm, r.recommended.confirm_k, r.recommended.confirm_m)
    assert "single_shift.jsonl.gz" in text.splitlines()[0] and "recommended" in format_tuning(r)


def test_quiet_period_overlapping_a_label_is_refused():
    labels = load_labels(DATA / "single_shift.labels.json")
    with pytest.raises(TuneError, match="lies in the quiet period"):
        tune(DATA / "single_shift.jsonl.gz", load_config(environ={}), budget_per_day=1.0,
             quiet_until=labels.incidents[0].end, labels=labels)


@pytest.fixture(scope="module")
def shifted_input(tmp_path_factory) -> Path:
    """600 samples with a 20-sigma step from sample 250 on: the default quiet half is not quiet."""
    return _write(tmp_path_factory.mktemp("tune") / "shifted.jsonl", 600, seed=5, step=(250, 600, 20.0))


def test_nothing_fits_exits_1_and_writes_nothing(shifted_input, config_file, tmp_path, capsys):
    out = tmp_path / "tuned.toml"
    code = main(["tune", str(shifted_input), "--budget", "0", "--config", str(config_file), "--write", str(out)])
    printed = capsys.readouterr().out
    assert code == EXIT_NOTHING_FITS == 1
    assert "no setting tried keeps alerts within 0/day" in printed and "closest: false_alarm" in printed
    assert "tried 20 of 20 settings" in printed and not out.exists()


def test_cli_writes_a_fragment_that_loads(shifted_input, config_file, tmp_path, capsys):
    out = tmp_path / "tuned.toml"
    code = main(["tune", str(shifted_input), "--budget", "1000", "--config", str(config_file), "--write", str(out),
                 "--quiet-until", "2026-05-28T22:55:00Z"])
    printed = capsys.readouterr().out
    assert code == 0 and "<- recommended" in printed and "[model]" not in printed
    assert load_config(out, environ={}).model.false_alarm == 1e-3   # the grid's most sensitive value


@pytest.mark.parametrize("args,needle", [
    (["--budget", "-1"], "--budget"),
    (["--budget", "nan"], "--budget"),
    (["--budget", "1", "--quiet-until", "yesterday"], "--quiet-until"),
    (["--budget", "1", "--quiet-until", "2026-05-28T22:55:00"], "no timezone"),
    (["--budget", "1", "--quiet-until", str(T0 - 60)], "outside the input"),
    (["--budget", "1", "--quiet-until", str(T0 + STEP * 100)], "too short"),
])
def test_bad_values_are_one_line_errors(shifted_input, config_file, capsys, args, needle):
    assert main(["tune", str(shifted_input), "--config", str(config_file), *args]) == EXIT_USAGE
    err = capsys.readouterr().err
    assert err.startswith("shiftsieve: error: ") and needle in err and err.count("\n") == 1


def test_docstring_examples_run():
    result = doctest.testmod(tune_module, optionflags=doctest.NORMALIZE_WHITESPACE)
    assert result.attempted > 0 and result.failed == 0

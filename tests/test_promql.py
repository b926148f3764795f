"""Replay of Prometheus range-query JSON (stream/promql.py), against the Prometheus HTTP API format
and, in the real-parts test, against a real Prometheus server answering /api/v1/query_range."""

import doctest
import gzip
import json
import math
import subprocess
import time
import urllib.parse
import urllib.request

import numpy as np
import pytest
from prometheus_client.parser import text_string_to_metric_families

from conftest import free_port, required_tool
from shiftsieve.stream import promql
from shiftsieve.stream.assemble import metric_labels
from shiftsieve.stream.cli import EXIT_USAGE, main
from shiftsieve.stream.decode import DecodeLimits, Vector
from shiftsieve.stream.promql import UNNAMED, query_range_records
from shiftsieve.stream.lines import InputError, Rejected
from shiftsieve.stream.readers import open_records
from shiftsieve.stream.samples import Sample, SampleAssembler

# The range-query example of the Prometheus HTTP API documentation
# (https://prometheus.io/docs/prometheus/latest/querying/api/#range-queries; content from memory):
# `up` over 30 s at a 15 s step, two targets, values as strings.
DOCS_EXAMPLE = {
    "status": "success",
    "data": {
        "resultType": "matrix",
        "result": [
            {"metric": {"__name__": "up", "job": "prometheus", "instance": "localhost:9090"},
             "values": [[1435781430.781, "1"], [1435781445.781, "1"], [1435781460.781, "1"]]},
            {"metric": {"__name__": "up", "job": "node", "instance": "localhost:9091"},
             "values": [[1435781430.781, "0"], [1435781445.781, "0"], [1435781460.781, "1"]]},
        ],
    },
}
TS = 1780000000.0


def _records(doc, entity_labels=("service", "instance"), limits=DecodeLimits(), raw_cap=65536):
    data = doc if isinstance(doc, bytes) else json.dumps(doc).encode()
    out = [r for _, r in query_range_records("t.json", data, limits, entity_labels=entity_labels, raw_cap=raw_cap)]
    return [r for r in out if isinstance(r, Vector)], [r for r in out if isinstance(r, Rejected)]


def _matrix(*series):
    return {"status": "success", "data": {"resultType": "matrix", "result": list(series)}}


def _series(name, values, **labels):
    metric = dict(labels, **({"__name__": name} if name is not None else {}))
    return {"metric": metric, "values": values}


def test_docs_example_gives_one_vector_per_entity_and_timestamp():
    vectors, rejected = _records(DOCS_EXAMPLE, entity_labels=["instance"])
    assert rejected == []
    # The docs' two series have different instances: two entities, three steps, in time order.
    assert [(v.ts, v.entity, v.metrics) for v in vectors] == [
        (ts, entity, {name: value})
        for ts, up in ((1435781430.781, (1.0, 0.0)), (1435781445.781, (1.0, 0.0)), (1435781460.781, (1.0, 1.0)))
        for entity, name, value in (("localhost:9090", 'up{job="prometheus"}', up[0]),
                                    ("localhost:9091", 'up{job="node"}', up[1]))]
    assert vectors[0].labels == {"instance": "localhost:9090"}


def test_module_docstring_example_runs():
    assert doctest.testmod(promql, optionflags=doctest.NORMALIZE_WHITESPACE).failed == 0


def test_entity_and_names_are_those_of_live_samples():
    """Same labels, same entity, names and labels as the sample assembler gives live samples."""
    labels = [{"service": "booking-api", "instance": "bh-app-01", "route": "/crossings"},
              {"service": "booking-api", "instance": "bh-app-01", "route": '/a"b\\c'},
              {"service": "manifest-db", "instance": "bh-db-01"}]
    doc = _matrix(*(_series("http_requests_per_s", [[TS, "3"]], **ls) for ls in labels))
    vectors, _ = _records(doc)
    assembler = SampleAssembler(["service", "instance"], step=30.0, allowed_lateness=0.0)
    for ls in labels:
        assembler.add(Sample(TS, "http_requests_per_s", dict(ls), 3.0))
    live = assembler.flush()
    assert [(v.entity, v.metrics, v.labels) for v in vectors] == [(v.entity, v.metrics, v.labels) for v in live]


def test_names_are_series_notation_that_readers_parse_back():
    values = {"route": '/x"y', "path": "C:\\tmp", "note": "two\nlines", "zone": "quay-a"}
    vectors, _ = _records(_matrix(_series("lat_p99_ms", [[TS, "1"]], service="s", instance="i", **values)))
    (name,) = vectors[0].metrics
    # Sorted label names, values escaped as the Prometheus text exposition format escapes them
    # (backslash, double quote, line feed; https://prometheus.io/docs/instrumenting/exposition_formats/):
    # prometheus-client's own parser reads the name back to the original labels.
    (family,) = text_string_to_metric_families(f"{name} 1\n")
    assert family.samples[0].name == "lat_p99_ms" and family.samples[0].labels == values
    assert name.index("note=") < name.index("path=") < name.index("route=") < name.index("zone=")
    # assemble.metric_labels (what model.group_by reads) finds the same keys, values as written.
    assert metric_labels(name) == {k: v.replace("\\", "\\\\").replace('"', '\\"').replace("\n", "\\n")
                                   for k, v in values.items()}


def test_series_without_name_is_named_by_rule():
    # rate(...) and most functions drop __name__ (Prometheus querying docs, "functions").
    vectors, rejected = _records(_matrix(_series(None, [[TS, "0.5"]], service="s", instance="i", code="500"),
                                         _series(None, [[TS, "0.25"]], service="s", instance="i")))
    assert rejected == []
    assert vectors[0].metrics == {UNNAMED: 0.25, f'{UNNAMED}{{code="500"}}': 0.5}


def test_non_finite_and_bad_value_strings_become_missing_and_counted():
    # The API sends values as strings; NaN and +-Inf are written "NaN", "+Inf", "-Inf" (HTTP API docs,
    # "Expression query result formats"). Python's float() reads all three (stdlib docs).
    values = [[TS, "1.5"], [TS + 30, "NaN"], [TS + 60, "+Inf"], [TS + 90, "-Inf"], [TS + 120, "oops"],
              [TS + 150, "1e400"], [TS + 180, 2.0]]
    vectors, rejected = _records(_matrix(_series("queue_depth", values, service="s", instance="i")))
    assert rejected == []
    assert [v.metrics["queue_depth"] for v in vectors] == [1.5, None, None, None, None, None, 2.0]
    assert [v.invalid for v in vectors] == [
        (), (("queue_depth", "non_finite"),), (("queue_depth", "non_finite"),), (("queue_depth", "non_finite"),),
        (("queue_depth", "not_a_number"),), (("queue_depth", "non_finite"),), ()]
    assert all(math.isnan(v.values[0]) for v in vectors[1:6])


def test_absent_points_leave_the_series_out_of_that_vector():
    doc = _matrix(_series("a", [[TS, "1"], [TS + 30, "2"]], service="s", instance="i"),
                  _series("b", [[TS + 30, "3"], [TS + 60, "4"]], service="s", instance="i"))
    vectors, _ = _records(doc)
    assert [v.metrics for v in vectors] == [{"a": 1.0}, {"a": 2.0, "b": 3.0}, {"b": 4.0}]


def test_malformed_items_are_rejected_with_reasons_and_every_point_is_accounted_for():
    good = [[TS, "1"], [TS + 30, "2"]]
    result = [
        _series("ok", good + [[TS + 60, "3"]], service="s", instance="i"),
        "not a series",                                                           # bad_series
        {"metric": {"__name__": "x", "service": "s", "instance": "i"}, "values": "1"},  # bad_series
        _series("x", good, service="s", instance="i", zone=7),                    # bad_labels
        _series("x", good, service="s"),                                          # no_entity
        _series("ok", good, service="s", instance="i"),                           # duplicate_series
        _series("x{y}", good, service="s", instance="i"),                         # bad_name
        _series("pts", [[TS, "1"], [TS, "9"], "7", [TS + 30], ["soon", "1"], [True, "1"], [1e12, "1"],
                        [TS + 60, "2"]], service="s", instance="i"),
    ]
    vectors, rejected = _records(_matrix(*result))
    by_reason = sorted((r.line, r.reason) for r in rejected)
    assert by_reason == [(2, "bad_series"), (3, "bad_series"), (4, "bad_labels"), (5, "no_entity"),
                         (6, "duplicate_series"), (7, "bad_name"), (8, "bad_point"), (8, "bad_point"),
                         (8, "bad_ts"), (8, "bad_ts"), (8, "duplicate_ts"), (8, "ts_out_of_range")]
    assert set(r.reason for r in rejected) <= promql.REASONS
    # Dead letters keep the item: a rejected point is a one-point series that can be read again.
    dup = next(r for r in rejected if r.reason == "duplicate_ts")
    assert json.loads(dup.raw) == {"metric": result[7]["metric"], "values": [[TS, "9"]]}
    assert "point 2" in dup.detail
    # Conservation: points in vectors + rejected points + points of rejected series = all points.
    points = sum(len(s["values"]) for s in result if isinstance(s, dict) and isinstance(s["values"], list))
    in_vectors = sum(len(v.metrics) for v in vectors)
    point_rejections = sum(r.reason in ("bad_point", "bad_ts", "ts_out_of_range", "duplicate_ts") for r in rejected)
    rejected_series_points = sum(len(result[r.line - 1]["values"]) for r in rejected
                                 if r.reason in ("bad_labels", "no_entity", "duplicate_series", "bad_name"))
    assert in_vectors + point_rejections + rejected_series_points == points
    assert [v.metrics for v in vectors] == [{"ok": 1.0, "pts": 1.0}, {"ok": 2.0}, {"ok": 3.0, "pts": 2.0}]


def test_no_series_with_the_entity_labels_is_a_clear_error():
    doc = _matrix(_series("up", [[TS, "1"]], job="ferry", instance="bh-app-01"))
    with pytest.raises(InputError, match=r"entity labels \(source.entity_labels\).*no service label"):
        _records(doc)


@pytest.mark.parametrize("data,needle", [
    # Error format of the HTTP API docs ("Format overview"): status, errorType, error.
    (b'{"status": "error", "errorType": "bad_data", "error": "invalid parameter \\"query\\":\\n parse error"}',
     'the Prometheus API returned an error: bad_data: invalid parameter "query": parse error'),
    (b'{"status": "success", "data": {"resultType": "vector", "result": []}}', 'resultType is \'vector\''),
    (b'{"status": "success", "data": {"resultType": "matrix", "result": []}}', "returned no series"),
    (b'{"status": "success", "data": {"resultType": "matrix"', "not valid JSON"),
    (b"[1, 2]", "not a Prometheus query_range response"),
    (b'{"status": "success", "data": null}', '"data" must be an object'),
])
def test_whole_document_problems_are_one_line_input_errors(data, needle):
    with pytest.raises(InputError) as info:
        _records(data)
    assert needle in str(info.value) and "\n" not in str(info.value)


def test_grid_of_200_series_by_1000_points_matches_numpy():
    rng = np.random.default_rng(11)
    grid = np.round(rng.normal(size=(1000, 200)), 6)
    holes = rng.random(grid.shape) < 0.01
    stamps = TS + 30.0 * np.arange(1000)
    doc = _matrix(*(_series(f"m{j:03d}", [[t, repr(x)] for t, x, h in zip(stamps.tolist(), grid[:, j].tolist(),
                                                                        holes[:, j]) if not h],
                            service="seatmap-worker", instance=f"wrk-{j % 2}") for j in range(200)))
    data = json.dumps(doc).encode()
    started = time.perf_counter()
    vectors, rejected = _records(data)
    elapsed = time.perf_counter() - started
    print(f"{len(data) / 1e6:.1f} MB, 200 x 1000 points: {elapsed * 1000:.0f} ms")
    assert rejected == [] and len(vectors) == 2000
    # numpy reference: entity wrk-0 holds the even columns; NaN where a point was left out.
    rows = [v for v in vectors if v.entity == "seatmap-worker/wrk-0"]
    got = np.array([[v.metrics.get(f"m{j:03d}", np.nan) for j in range(0, 200, 2)] for v in rows])
    np.testing.assert_array_equal(got, np.where(holes, np.nan, grid)[:, ::2])
    assert [v.ts for v in rows] == stamps.tolist()


# --- through open_records and the CLI ------------------------------------------------------------------


def _incident(tmp_path, name="incident.json", doc=None):
    doc = doc or _matrix(_series("queue_depth", [[TS + 30 * t, str(t % 7)] for t in range(50)],
                                 service="s", instance="i"))
    path = tmp_path / name
    data = json.dumps(doc).encode()
    path.write_bytes(gzip.compress(data) if name.endswith(".gz") else data)
    return path


def test_open_records_reads_json_and_json_gz(tmp_path):
    for name in ("a.json", "a.JSON.gz"):
        with open_records(_incident(tmp_path, name)) as records:
            vectors = list(records)
        assert len(vectors) == 50 and vectors[3].metrics == {"queue_depth": 3.0}


def test_open_records_bounds_the_document(tmp_path):
    path = _incident(tmp_path)
    with pytest.raises(InputError, match=r"more than 1,024 bytes \(input.max_file_bytes\)"):
        open_records(path, max_file_bytes=1024)
    gz = _incident(tmp_path, "b.json.gz")
    gz.write_bytes(gz.read_bytes()[:-12])   # cut inside the gzip trailer
    with pytest.raises(InputError, match="cannot read"):
        open_records(gz)


def test_replay_cli_counts_and_dead_letters_bad_items(tmp_path, capsys):
    doc = _matrix(_series("queue_depth", [[TS + 30 * t, str(t % 7)] for t in range(50)] + [["x", "1"]],
                          service="s", instance="i"),
                  _series("up", [[TS, "1"]], job="ferry"))
    src, dead, events = _incident(tmp_path, doc=doc), tmp_path / "dead.jsonl", tmp_path / "ev.jsonl"
    assert main(["replay", str(src), "--events", str(events), "--dead-letter", str(dead)]) == 0
    assert "50 vectors (0 scored), 1 entity," in capsys.readouterr().err
    letters = [json.loads(line) for line in dead.read_text().splitlines()]
    assert [(d["line"], d["reason"]) for d in letters] == [(1, "bad_ts"), (2, "no_entity")]
    assert json.loads(letters[1]["raw"]) == doc["data"]["result"][1]


@pytest.mark.parametrize("content,needle", [
    (b'{"status":"error","errorType":"timeout","error":"query timed out in expression evaluation"}',
     "returned an error: timeout: query timed out"),
    (b"not json at all", "not valid JSON"),
    (b'{"status":"success","data":{"resultType":"matrix","result":[{"metric":{}', "not valid JSON"),
    (b"{" + b" " * 2000 + b"}", "input.max_file_bytes"),
])
def test_replay_cli_bad_input_is_one_line_exit_2(tmp_path, capsys, content, needle):
    src = tmp_path / "bad.json"
    src.write_bytes(content)
    config = tmp_path / "c.toml"
    config.write_text("[input]\nmax_file_bytes = 1024\n")
    assert main(["replay", str(src), "--events", str(tmp_path / "e.jsonl"), "--config", str(config)]) == EXIT_USAGE
    err = capsys.readouterr().err
    assert err.startswith("shiftsieve: error: ") and needle in err and err.count("\n") == 1


# --- real parts: promtool backfill, a Prometheus server, /api/v1/query_range ----------------------------

STEP = 30
SAMPLES = 240          # 2 h at 30 s
SHIFT_FROM = 170       # the stepped window: samples 170..239 of one metric of booking-api-1
METRICS = ['cpu_ratio', 'http_requests_per_s{route="/crossings"}', 'http_requests_per_s{route="/seats"}',
           'lat_p99_ms', 'queue_depth']


def _scenario(t0):
    """Brinehaven Ferry Line, two booking-api instances: 5 metrics driven by one traffic factor (seed 7).

    Returns {instance: {metric: [value text per sample]}} (the text is what the OpenMetrics file holds).
    """
    rng = np.random.default_rng(7)
    traffic = 1 + 0.3 * np.sin(np.arange(SAMPLES) * 2 * np.pi / 120)
    out = {}
    for instance in ("booking-api-1", "booking-api-2"):
        noise = rng.normal(size=(SAMPLES, 5))
        columns = np.column_stack([0.4 * traffic + 0.02 * noise[:, 0], 60 * traffic + 2 * noise[:, 1],
                                   25 * traffic + 1.5 * noise[:, 2], 180 * traffic * np.exp(0.03 * noise[:, 3]),
                                   8 * traffic + 0.5 * noise[:, 4]])
        if instance == "booking-api-1":
            columns[SHIFT_FROM:, 4] += 6.0   # queue_depth steps up by 12 noise sigmas
        out[instance] = {m: [repr(round(float(x), 4)) for x in columns[:, j]] for j, m in enumerate(METRICS)}
    return out


def _openmetrics(t0, data):
    lines = []
    for family in ("cpu_ratio", "http_requests_per_s", "lat_p99_ms", "queue_depth"):
        lines.append(f"# TYPE {family} gauge")
        for instance, metrics in data.items():
            for metric, values in metrics.items():
                if metric.split("{")[0] != family:
                    continue
                extra = ("," + metric.split("{")[1].rstrip("}")) if "{" in metric else ""
                for i, text in enumerate(values):
                    lines.append(f'{family}{{job="brinehaven",instance="{instance}"{extra}}} {text} {t0 + STEP * i}')
    return "\n".join(lines) + "\n# EOF\n"   # OpenMetrics ends with "# EOF" (OpenMetrics 1.0 spec)


@pytest.fixture
def prometheus_export(tmp_path):
    """A query_range export from a real Prometheus over a backfilled window: (path, t0, data)."""
    promtool, prometheus = required_tool("promtool"), required_tool("prometheus")
    # Backfilled blocks must not overlap the head block (Prometheus storage docs, "Backfilling"):
    # a 2 h window ending hours ago, aligned to the 2 h block range.
    t0 = int(time.time()) // 7200 * 7200 - 6 * 3600
    data = _scenario(t0)
    (tmp_path / "in.om").write_text(_openmetrics(t0, data))
    tsdb = tmp_path / "tsdb"
    subprocess.run([promtool, "tsdb", "create-blocks-from", "openmetrics", str(tmp_path / "in.om"), str(tsdb)],
                   check=True, capture_output=True, timeout=60)
    (tmp_path / "prometheus.yml").write_text("global:\n  scrape_interval: 1m\n")
    port = free_port()
    log = open(tmp_path / "prometheus.log", "wb")
    proc = subprocess.Popen([prometheus, f"--storage.tsdb.path={tsdb}", f"--config.file={tmp_path / 'prometheus.yml'}",
                             f"--web.listen-address=127.0.0.1:{port}"], stdout=log, stderr=subprocess.STDOUT,
                            stdin=subprocess.DEVNULL)
    try:
        deadline = time.monotonic() + 30
        while True:
            try:
                with urllib.request.urlopen(f"http://127.0.0.1:{port}/-/ready", timeout=2) as r:
                    if r.status == 200:
                        break
            except OSError:
                pass
            if proc.poll() is not None or time.monotonic() > deadline:
                pytest.fail(f"prometheus did not become ready: {(tmp_path / 'prometheus.log').read_text()[-500:]}")
            time.sleep(0.1)
        query = urllib.parse.urlencode({"query": '{job="brinehaven"}', "start": t0,
                                        "end": t0 + STEP * (SAMPLES - 1), "step": f"{STEP}s"})
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/api/v1/query_range?{query}", timeout=10) as r:
            body = r.read()
    finally:
        proc.terminate()
        proc.wait(timeout=10)
        log.close()
    path = tmp_path / "incident.json"
    path.write_bytes(body)
    return path, t0, data


def test_real_prometheus_export_replays(prometheus_export, tmp_path, capsys):
    path, t0, data = prometheus_export
    with open_records(path, entity_labels=["job", "instance"]) as records:
        vectors = list(records)
    assert all(isinstance(v, Vector) for v in vectors)
    entities = {f"brinehaven/{i}" for i in data}
    assert {v.entity for v in vectors} == entities
    for entity in entities:
        mine = [v for v in vectors if v.entity == entity]
        assert len(mine) == SAMPLES                                      # one vector per step
        assert [v.ts for v in mine] == [float(t0 + STEP * i) for i in range(SAMPLES)]
        assert all(list(v.metrics) == sorted(METRICS) for v in mine)
        expected = data[entity.split("/")[1]]
        # Prometheus writes each float back in Go's shortest form (strconv.FormatFloat 'f', -1), which
        # parses to the same double as the backfilled text (both are correctly rounded).
        for metric in METRICS:
            assert [v.metrics[metric] for v in mine] == [float(x) for x in expected[metric]]
    config = tmp_path / "c.toml"
    config.write_text('[source]\nentity_labels = ["job", "instance"]\n[model]\nwarmup = 120\n')
    events = tmp_path / "events.jsonl"
    assert main(["replay", str(path), "--events", str(events), "--config", str(config)]) == 0
    assert f"{2 * SAMPLES} vectors ({2 * (SAMPLES - 120)} scored), 2 entities" in capsys.readouterr().err
    firing = [json.loads(line) for line in events.read_text().splitlines()]
    firing = [e for e in firing if e["state"] == "firing"]
    stepped = [e for e in firing if e["entity"] == "brinehaven/booking-api-1"
               and any(m["name"] == "queue_depth" for m in e["metrics"])]
    assert stepped and t0 + STEP * SHIFT_FROM <= stepped[0]["ts"] <= t0 + STEP * (SHIFT_FROM + 10)
    print(f"{len(firing)} firing events; queue_depth first at sample {(stepped[0]['ts'] - t0) / STEP:.0f}")

"""Per-entity snapshots: round-trip equivalence, corruption, the state directory, no pickle.

The round trip is a self-consistency test: the reference is the same stream run without
interruption (there is no outside reference for "the state was captured completely").
"""

import ast
import copy
import hashlib
import io
import json
import os
import struct
import warnings
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

import shiftsieve.stream.state as state_module
from shiftsieve.models.decision import FIRING
from shiftsieve.models.detector import DetectorConfig
from shiftsieve.stream.assemble import EntityModel, MetricRules
from shiftsieve.stream.decode import Vector
from shiftsieve.stream.events import events_from_transitions
from shiftsieve.stream.state import (HEADER_SIZE, SNAPSHOT_VERSION, SettingsChanged, SnapshotError, StateDirectory,
                                     restore_entity, snapshot_entity)

CONFIG = DetectorConfig(warmup=200)
RULES = MetricRules(log_patterns=("lat_*",), group_by=("dep",), drop_after=100)
ENTITY = "checkout/3"
LATE, GONE, SHIFTED = 'late_ms{dep="b"}', "gone_ratio", "err_7"


def synthetic_vectors(samples=1300, seed=3):
    """30 metrics with rank-3 shared movement plus noise, two label groups, holes, a metric that
    appears at 500, one that stops at 650 (dropped ~100 samples later), an 8-sigma step on
    ``err_7`` over 900..1000 and a shift of the whole ``dep="a"`` group over 1100..1160."""
    rng = np.random.default_rng(seed)
    names = ([f'lat_{i}{{dep="a"}}' for i in range(8)] + [f'cpu_{i}{{dep="b"}}' for i in range(8)]
             + [f"err_{i}" for i in range(13)] + [GONE, LATE])
    n = len(names)
    loadings = rng.standard_normal((n, 3)) * 4.0
    factors = rng.standard_normal((samples, 3)).cumsum(axis=0) * 0.03 + rng.standard_normal((samples, 3))
    X = 200.0 + factors @ loadings.T + rng.standard_normal((samples, n))
    X[900:1000, names.index(SHIFTED)] += 8.0
    X[1100:1160, :8] += 2.0
    X[rng.random(X.shape) < 0.02] = np.nan
    vectors = []
    for t in range(samples):
        metrics = {}
        for j, name in enumerate(names):
            if (name == LATE and t < 500) or (name == GONE and t >= 650) or (j == 3 and t % 97 == 0):
                continue   # not sent at all (another key layout); NaN below is sent as null
            metrics[name] = None if np.isnan(X[t, j]) else float(X[t, j])
        vectors.append(Vector(1.78e9 + 30.0 * t, ENTITY, metrics, {"host": "h1"}))
    return vectors


VECTORS = synthetic_vectors()
SIZES = np.random.default_rng(4).integers(1, 48, size=200)
SIZES = SIZES[: np.searchsorted(SIZES.cumsum(), len(VECTORS)) + 1]


def situation(stream):
    """The states a restore must survive, as seen at a cut point."""
    det = stream.detector
    return {"warming_up": det.warming_up, "firing": bool((det.tracker.state == FIRING).any()),
            "late_metric": LATE in stream.names, "probation": bool(len(det.probation)),
            "group_column": bool(det.groups), "gone_dropped": det.samples > 0 and GONE not in stream.names}


def run(restore=False):
    """Feed VECTORS in batches of SIZES as the engine does; optionally snapshot and restore the
    stream before every batch.  Returns the transitions, events, shifts and full state after
    every batch, and the situations at the cuts."""
    stream = EntityModel(ENTITY, RULES, CONFIG)
    transitions, events, shifts, states, seen = [], [], [], [], []
    start = 0
    for size in SIZES:
        if restore:
            seen.append(situation(stream))
            before = full_state(stream)
            stream, offsets = restore_entity(snapshot_entity(stream, {"metrics/0": start}), RULES, CONFIG)
            assert offsets == {"metrics/0": start}
            assert_same(full_state(stream), before, f"restored before sample {start}")
        X, ts = stream.assemble(VECTORS[start:start + size])
        result = stream.detector.process(X, ts)
        stream.observe(X)
        stream.last_residual_norm = float(result.residual_norm[-1])
        transitions += [(t.kind, start + t.row, t.onset_ts, t.onset, [stream.column_names[m] for m in t.metrics],
                         t.shift, t.value, t.expected) for t in result.transitions]
        events += list(events_from_transitions(stream, result.transitions, ts))
        shifts.append(result.shift_sigma)
        states.append(copy.deepcopy(full_state(stream)))
        start += int(size)
    return transitions, events, shifts, states, seen


def full_state(stream):
    """Every attribute of the stream and its models, derived ones included, as comparable values."""
    det = stream.detector
    out = {}
    for prefix, obj in (("stream", stream), ("detector", det), ("normaliser", det.normaliser),
                        ("baseline", det.baseline), ("tracker", det.tracker), ("probation", det.probation)):
        for key, value in vars(obj).items():
            if key in ("detector", "normaliser", "baseline", "tracker", "probation", "_positions"):
                continue
            out[f"{prefix}.{key}"] = value
    out["detector._warmup_rows"] = np.array(out["detector._warmup_rows"])
    out["detector.groups"] = [g.tolist() for g in det.groups]
    out["probation.sums"] = {j: [np.asarray(v[0]), np.asarray(v[1]), v[2], v[3]]
                             for j, v in det.probation.sums.items()}
    return out


def assert_same(a, b, path=""):
    if isinstance(a, np.ndarray) or isinstance(b, np.ndarray):
        assert isinstance(a, np.ndarray) and isinstance(b, np.ndarray), path
        assert a.dtype == b.dtype and np.array_equal(a, b, equal_nan=a.dtype.kind == "f"), path
    elif isinstance(a, dict):
        assert list(a) == list(b), path
        for k in a:
            assert_same(a[k], b[k], f"{path}.{k}")
    elif isinstance(a, (list, tuple)):
        assert len(a) == len(b), path
        for i, (x, y) in enumerate(zip(a, b)):
            assert_same(x, y, f"{path}[{i}]")
    else:
        assert a == b, path


def test_snapshot_restore_at_every_batch_boundary_continues_identically():
    """Self-consistency: restoring before every batch gives the uninterrupted run's transitions,
    events, and state after every batch (shifts within 1e-9, state arrays bit for bit)."""
    ref_transitions, ref_events, ref_shifts, ref_states, _ = run()
    transitions, events, shifts, states, seen = run(restore=True)
    # The cuts covered warm-up, an open incident with a firing metric, a late metric on probation,
    # group columns and a dropped metric (else the test would prove less than it says).
    for key in seen[0]:
        assert any(s[key] for s in seen), key
    assert any(s["firing"] and s["group_column"] for s in seen)
    kinds = [(k, names) for k, _, _, _, names, *_ in ref_transitions]
    assert ("firing", [SHIFTED]) in kinds and ("firing", ['group:dep=a']) in kinds
    assert len(transitions) == len(ref_transitions)
    for got, want in zip(transitions, ref_transitions):
        assert got[:5] == want[:5]
        for x, y in zip(got[5:], want[5:]):
            np.testing.assert_allclose(x, y, rtol=0, atol=1e-9)
    assert events == ref_events
    for got, want in zip(shifts, ref_shifts):
        np.testing.assert_allclose(got, want, rtol=0, atol=1e-9)
    assert len(states) == len(ref_states)
    for i, (got, want) in enumerate(zip(states, ref_states)):
        assert_same(got, want, f"after batch {i}")


def test_every_attribute_is_saved_or_derived():
    """A new attribute on a model class must be added to the snapshot (or declared derived here)."""
    stream = EntityModel(ENTITY, RULES, CONFIG)
    X, ts = stream.assemble(VECTORS[:300])
    stream.detector.process(X, ts)
    stream.observe(X)
    det = stream.detector
    saved_or_derived = {
        "stream": {"entity", "rules", "names", "index", "detector", "group_labels", "_positions", "_last_seen",
                   "ignored_metrics", "last_ts", "last_residual_norm", "labels"},
        "detector": {"config", "lam", "_scale_decay", "normaliser", "baseline", "tracker",
                     "residual_scale", "tail_factor", "warm_start", "groups", "phi", "_lipschitz", "_warmup_rows", "probation",
                     "admitted", "samples"},
        "probation": {"sums"},
        "normaliser": {"log_mask", "halflife", "decay", "min_scale", "settle", "loc", "scale", "count", "resolution"},
        "baseline": {"fixed_rank", "energy", "max_rank", "decay", "U", "singular_values"},
        "tracker": {"config", "_window_mask", "state", "history", "below", "firing_for", "peak_shift",
                    "peak_value", "peak_expected", "incident"},
    }
    for name, obj in (("stream", stream), ("detector", det), ("normaliser", det.normaliser),
                      ("baseline", det.baseline), ("tracker", det.tracker), ("probation", det.probation)):
        assert set(vars(obj)) == saved_or_derived[name], name


def test_open_incident_and_offsets_survive():
    stream = EntityModel(ENTITY, RULES, CONFIG)
    start = 0
    for size in SIZES:
        X, ts = stream.assemble(VECTORS[start:start + size])
        stream.detector.process(X, ts)
        stream.observe(X)
        start += int(size)
        if stream.detector.tracker.incident is not None:
            break
    restored, offsets = restore_entity(snapshot_entity(stream, {"m/0": 7, "m/1": 12}), RULES, CONFIG)
    assert offsets == {"m/0": 7, "m/1": 12}
    a, b = stream.detector.tracker.incident, restored.detector.tracker.incident
    assert (a.onset_ts, a.members, a.resolved) == (b.onset_ts, b.members, b.resolved)
    assert restored.labels == {"host": "h1"} and restored.last_ts == stream.last_ts


def test_fresh_stream_round_trips():
    stream, offsets = restore_entity(snapshot_entity(EntityModel("e", RULES, CONFIG)), RULES, CONFIG)
    assert stream.names == [] and stream.last_ts == float("-inf") and offsets == {}
    assert stream.detector.warming_up


# -- corruption ---------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def snapshot():
    stream = EntityModel(ENTITY, RULES, CONFIG)
    X, ts = stream.assemble(VECTORS[:600])
    stream.detector.process(X, ts)
    stream.observe(X)
    return snapshot_entity(stream, {"m/0": 600})


def frame(body: bytes, archive: bytes, version: int = SNAPSHOT_VERSION) -> bytes:
    """A snapshot built by the module docstring's description of the format."""
    prefix = struct.pack(">8sHIQ", b"\x89SHSNAP\n", version, len(body), len(archive))
    return prefix + hashlib.sha256(prefix + body + archive).digest() + body + archive


def reframe(meta: dict, archive: bytes, version: int = SNAPSHOT_VERSION) -> bytes:
    """Re-encoded content in a valid frame (right lengths and checksum)."""
    return frame(json.dumps(meta).encode(), archive, version)


def split(data: bytes) -> tuple[dict, dict]:
    meta_len = struct.unpack_from(">I", data, 10)[0]
    meta = json.loads(data[HEADER_SIZE:HEADER_SIZE + meta_len])
    with np.load(io.BytesIO(data[HEADER_SIZE + meta_len:]), allow_pickle=False) as npz:
        return meta, {k: npz[k] for k in npz.files}


def npz(arrays: dict, compressed: bool = False) -> bytes:
    out = io.BytesIO()
    (np.savez_compressed if compressed else np.savez)(out, **arrays)
    return out.getvalue()


def refused(data, match: str | None = None) -> str:
    with pytest.raises(SnapshotError, match=match) as info:
        restore_entity(data, RULES, CONFIG)
    message = str(info.value)
    assert message and "\n" not in message
    return message


def test_the_format_is_the_documented_one(snapshot):
    meta_len, archive_len = struct.unpack_from(">IQ", snapshot, 10)
    body, archive = snapshot[HEADER_SIZE:HEADER_SIZE + meta_len], snapshot[HEADER_SIZE + meta_len:]
    assert len(archive) == archive_len and frame(body, archive) == snapshot
    meta, arrays = split(snapshot)
    assert meta["version"] == SNAPSHOT_VERSION and meta["offsets"] == {"m/0": 600}
    assert all(a.dtype != object for a in arrays.values())
    stream, offsets = restore_entity(reframe(meta, npz(arrays)), RULES, CONFIG)   # written from the description
    assert offsets == {"m/0": 600} and stream.names == meta["names"]


@pytest.mark.parametrize("where", [0, 8, 9, 12, 20, 30, HEADER_SIZE, HEADER_SIZE + 40, -200, -1])
def test_a_flipped_byte_is_refused(snapshot, where):
    data = bytearray(snapshot)
    data[where] ^= 0x10
    refused(bytes(data))


@pytest.mark.parametrize("length", [0, 1, 8, HEADER_SIZE - 1, HEADER_SIZE, HEADER_SIZE + 10, -1])
def test_truncation_is_refused(snapshot, length):
    refused(snapshot[:length], "empty|truncated")


def test_specific_faults_have_specific_messages(snapshot):
    meta, arrays = split(snapshot)
    archive = npz(arrays)
    assert "version 1" in refused(reframe(meta, archive, version=1), "unsupported snapshot version")   # the format before 2
    refused(snapshot[:22] + bytes(32) + snapshot[HEADER_SIZE:], "checksum")
    refused(snapshot + b"\0", "trailing")
    refused(b"", "empty")
    refused(os.urandom(4096), "magic")
    refused("not bytes", "bytes")
    refused(reframe(dict(meta, version=SNAPSHOT_VERSION + 1), archive), "metadata version")
    refused(reframe(meta, npz(arrays, compressed=True)), "compressed")
    refused(reframe(dict(meta, names=meta["names"][:-1]), archive), "shape")
    refused(reframe(dict(meta, names=[meta["names"][0]] * len(meta["names"])), archive), "duplicates")
    refused(reframe(meta, npz({k: v for k, v in arrays.items() if k != "baseline.U"})), "lacks")
    refused(reframe(meta, npz(dict(arrays, **{"normaliser.loc": arrays["normaliser.loc"].astype(np.float32)}))),
            "float32")
    refused(reframe(meta, npz(dict(arrays, **{"tracker.state": np.full_like(arrays["tracker.state"], 7)}))),
            "states")
    refused(reframe(dict(meta, incident={"onset_ts": 1.0, "members": [10_000], "resolved": []}), archive),
            "incident")
    refused(reframe(dict(meta, samples=True), archive), "samples")
    refused(reframe(meta, b"PK\x03\x04 not really a zip"), "array archive")
    refused(frame(json.dumps(meta).encode().replace(b'"samples":', b'"x": NaN, "samples":', 1), archive),
            "non-finite")
    refused(frame(b"\xff\xfe", archive), "unreadable metadata")
    refused(frame(b"[1, 2]", archive), "not a JSON object")


@settings(max_examples=150, deadline=None)
@given(st.binary(max_size=600))
def test_arbitrary_bytes_raise_only_snapshot_error(data):
    for candidate in (data, b"\x89SHSNAP\n\x00\x01" + data):
        with pytest.raises(SnapshotError):
            restore_entity(candidate, RULES, CONFIG)


@settings(max_examples=60, deadline=None)
@given(st.data())
def test_any_damage_to_a_valid_snapshot_is_refused(snapshot, data):
    where = data.draw(st.integers(0, len(snapshot) - 1))
    value = data.draw(st.integers(0, 255).filter(lambda v: v != snapshot[where]))
    damaged = snapshot[:where] + bytes([value]) + snapshot[where + 1:]
    with pytest.raises(SnapshotError):
        restore_entity(damaged, RULES, CONFIG)


def test_other_settings_are_reported_and_incompatible_warmup_refused(snapshot):
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        restore_entity(snapshot, MetricRules(log_patterns=("lat_*",), group_by=("dep",), drop_after=100),
                       DetectorConfig(warmup=200))   # equal settings, other objects: silent
    with pytest.warns(SettingsChanged) as caught:
        restore_entity(snapshot, RULES, DetectorConfig(warmup=200, false_alarm=1e-2))
    assert caught[0].message.changes == {"detector.false_alarm": (1e-3, 1e-2)}
    assert caught[0].message.entity == ENTITY
    warming = EntityModel("w", RULES, CONFIG)
    X, ts = warming.assemble(VECTORS[:150])
    warming.detector.process(X, ts)
    with pytest.raises(SnapshotError, match="warm-up rows"), warnings.catch_warnings():
        warnings.simplefilter("ignore", SettingsChanged)
        restore_entity(snapshot_entity(warming), RULES, DetectorConfig(warmup=100))


# -- the state directory ------------------------------------------------------------------------
WEIRD = ["a/b", "..", "../../etc/passwd", "ünï/cødé ✓", "", "x" * 256, "e-00.snap", "C:\\tmp", "nul\x00byte",
         "\udc80lone surrogate"]


def small_stream(entity: str) -> EntityModel:
    stream = EntityModel(entity, RULES, CONFIG)
    stream.assemble(VECTORS[:3])
    return stream


def test_weird_entity_names_stay_inside_the_directory(tmp_path):
    directory = StateDirectory(tmp_path / "state")
    for i, entity in enumerate(WEIRD):
        path = directory.save(small_stream(entity), {"m/0": i})
        assert path.parent == directory.path and len(path.name) < 255
    assert sorted(os.listdir(tmp_path)) == ["state"]
    assert len(os.listdir(directory.path)) == len(WEIRD)
    assert directory.entities() == sorted(WEIRD)
    for i, entity in enumerate(WEIRD):
        stream, offsets = directory.load(entity, RULES, CONFIG)
        assert stream.entity == entity and offsets == {"m/0": i} and stream.names == small_stream(entity).names
    assert directory.load("never seen", RULES, CONFIG) is None


def test_saves_are_atomic_and_leave_no_temporary_files(tmp_path, monkeypatch):
    directory = StateDirectory(tmp_path)
    directory.save(small_stream("e"), {"m/0": 1})
    directory.save(small_stream("e"), {"m/0": 2})
    assert os.listdir(tmp_path) == [directory.file_for("e").name]
    assert directory.load("e", RULES, CONFIG)[1] == {"m/0": 2}

    def crash(*args):
        raise OSError("disk gone")
    monkeypatch.setattr(os, "replace", crash)
    with pytest.raises(OSError, match="disk gone"):
        directory.save(small_stream("e"), {"m/0": 3})
    monkeypatch.undo()
    assert os.listdir(tmp_path) == [directory.file_for("e").name]          # the temporary file is gone
    assert directory.load("e", RULES, CONFIG)[1] == {"m/0": 2}            # the old snapshot is intact
    (tmp_path / f".{directory.file_for('e').name}.abc.tmp").write_bytes(b"half")   # a crash's leftover
    (tmp_path / "README").write_text("not a snapshot")
    assert directory.entities() == ["e"]


def test_a_corrupt_file_is_reported_by_name(tmp_path):
    directory = StateDirectory(tmp_path)
    for entity in ("good", "bad", "x" * 200):
        directory.save(small_stream(entity))
    bad = directory.file_for("bad")
    bad.write_bytes(bad.read_bytes()[:-5])
    with pytest.raises(SnapshotError, match="truncated") as info:
        directory.load("bad", RULES, CONFIG)
    assert str(bad) in str(info.value)
    assert directory.load("good", RULES, CONFIG)[0].entity == "good"   # one bad file costs only its entity
    # A valid snapshot under another entity's name is refused too.
    directory.file_for("good").write_bytes(directory.file_for("x" * 200).read_bytes())
    with pytest.raises(SnapshotError, match="holds entity"):
        directory.load("good", RULES, CONFIG)
    hashed = directory.file_for("x" * 200)
    hashed.write_bytes(b"garbage")
    with pytest.raises(SnapshotError, match=hashed.name):
        directory.entities()


# -- safety ---------------------------------------------------------------------------------------
def test_the_module_uses_no_pickle_eval_or_dynamic_import():
    source = Path(state_module.__file__).read_text()
    tree = ast.parse(source)
    banned = {"pickle", "cPickle", "dill", "marshal", "shelve", "importlib", "eval", "exec", "compile", "__import__"}
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            assert not {a.name.split(".")[0] for a in node.names} & banned
        elif isinstance(node, ast.ImportFrom):
            assert (node.module or "").split(".")[0] not in banned
        elif isinstance(node, (ast.Name, ast.Attribute)):
            assert (node.id if isinstance(node, ast.Name) else node.attr) not in banned
        if isinstance(node, ast.Call) and isinstance(node.func, ast.Attribute) and node.func.attr == "load":
            keywords = {k.arg: k.value for k in node.keywords}
            if "allow_pickle" in keywords or ast.unparse(node.func.value) == "np":
                assert isinstance(keywords.get("allow_pickle"), ast.Constant) and \
                    keywords["allow_pickle"].value is False, ast.unparse(node)
    assert "allow_pickle=True" not in source and "import pickle" not in source

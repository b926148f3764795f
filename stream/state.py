"""Per-entity snapshots: one :class:`EntityModel`'s whole model state as versioned, checksummed bytes.

A snapshot holds everything an entity has learned (normaliser, baseline, residual scales,
warm start, alert states, the open incident, warm-up rows, probation sums, metric names and
when each was last seen) plus the input offsets it covers, so that a process taking over a
partition continues exactly where the previous one stopped.  Configuration objects are not
saved: they are passed at restore time, and a snapshot taken under other settings is
restored with a :class:`SettingsChanged` warning listing the differences.

Format, version 1 (integers big-endian)::

    offset  size  field
    0       8     magic b"\\x89SHSNAP\\n"
    8       2     format version, uint16 (SNAPSHOT_VERSION)
    10      4     M = length of the metadata, uint32
    14      8     A = length of the array archive, uint64
    22      32    SHA-256 of bytes 0..21 followed by the M + A payload bytes
    54      M     metadata: a UTF-8 JSON object (no NaN/Infinity literals)
    54 + M  A     arrays: an uncompressed .npz archive (np.savez), read with allow_pickle=False

and nothing after.  No pickle anywhere: arrays are plain dtypes, the rest is JSON.

Metadata keys: ``version`` (= the header's), ``entity``, ``names`` (metric names, column
order), ``group_labels``, ``labels`` (the entity's labels), ``last_ts`` (null before the first
vector), ``last_residual_norm`` (the last batch's, for the exporter; null if none),
``ignored_metrics``, ``samples``, ``offsets`` (``{"topic/partition": next offset}``),
``incident`` (null, or ``onset_ts`` and the decision columns in ``members`` / ``resolved``),
``settings`` (``detector``: the DetectorConfig's fields, ``rules``: the MetricRules' fields;
the fingerprint compared at restore).

Arrays, named ``part.field`` (n metrics, g groups, p = n + g decision columns, r baseline
rank, w warm-up rows held, q metrics on probation, s their regression size, m group members
in all): ``normaliser.{log_mask (n,) bool, loc (n,), scale (n,), count (n,) int64, resolution (n,)}``,
``baseline.{U (n, r), singular_values (r,)}``, ``detector.{residual_scale (n,), tail_factor (n,),
admitted (n,) bool, warm_start (p,), warmup_rows (w, n), group_members (m,) int64, group_sizes (g,) int64}``,
``probation.{metric (q,) int64, ww (q, s, s), wz (q, s), zz (q,), count (q,) int64}``,
``tracker.{state (p,) int8, history (p,) uint64, below (p,) int64, firing_for (p,) int64,
peak_shift (p,), peak_value (p,), peak_expected (p,)}``, ``stream.last_seen (n,) int64``;
float64 unless noted.  Derived values are rebuilt, not stored: lambda, decays and the alert
window mask (from the configuration), the dictionary and its Lipschitz constant (from the
groups), the name -> column index (from the names) and the column-position cache.

Restoring checks length, magic, version, declared against actual length, checksum, then every
array's dtype and shape against the metadata; anything wrong is one :class:`SnapshotError`
with a one-line message, never a half-built stream.
"""

from __future__ import annotations

import dataclasses
import hashlib
import io
import json
import os
import struct
import tempfile
import warnings
import zipfile
from pathlib import Path
from typing import Any

import numpy as np

from shiftsieve.models.detector import DetectorConfig

from .assemble import EntityModel, MetricRules

__all__ = ["SNAPSHOT_VERSION", "SettingsChanged", "SnapshotError", "StateDirectory", "restore_entity",
           "snapshot_entity"]

SNAPSHOT_VERSION = 2   # 2: normaliser.resolution and detector.tail_factor
MAGIC = b"\x89SHSNAP\n"
_PREFIX = struct.Struct(">8sHIQ")        # magic, version, metadata length, array archive length
HEADER_SIZE = _PREFIX.size + 32          # + SHA-256

#: Every array of a snapshot: dtype and shape in the dimension symbols of the module docstring.
_ARRAYS: dict[str, tuple[str, tuple[str, ...]]] = {
    "normaliser.log_mask": ("bool", ("n",)),
    "normaliser.loc": ("float64", ("n",)),
    "normaliser.scale": ("float64", ("n",)),
    "normaliser.count": ("int64", ("n",)),
    "normaliser.resolution": ("float64", ("n",)),
    "baseline.U": ("float64", ("n", "r")),
    "baseline.singular_values": ("float64", ("r",)),
    "detector.residual_scale": ("float64", ("n",)),
    "detector.tail_factor": ("float64", ("n",)),
    "detector.admitted": ("bool", ("n",)),
    "detector.warm_start": ("float64", ("p",)),
    "detector.warmup_rows": ("float64", ("w", "n")),
    "detector.group_members": ("int64", ("m",)),
    "detector.group_sizes": ("int64", ("g",)),
    "probation.metric": ("int64", ("q",)),
    "probation.ww": ("float64", ("q", "s", "s")),
    "probation.wz": ("float64", ("q", "s")),
    "probation.zz": ("float64", ("q",)),
    "probation.count": ("int64", ("q",)),
    "tracker.state": ("int8", ("p",)),
    "tracker.history": ("uint64", ("p",)),
    "tracker.below": ("int64", ("p",)),
    "tracker.firing_for": ("int64", ("p",)),
    "tracker.peak_shift": ("float64", ("p",)),
    "tracker.peak_value": ("float64", ("p",)),
    "tracker.peak_expected": ("float64", ("p",)),
    "stream.last_seen": ("int64", ("n",)),
}


class SnapshotError(Exception):
    """A snapshot that cannot be restored (corrupt, truncated, wrong version, inconsistent)."""

    def __init__(self, message: str) -> None:
        super().__init__(" ".join(message.split()))   # always one line


class SettingsChanged(UserWarning):
    """A snapshot restored under settings other than those it was taken with.

    ``str()`` lists the changed settings without the entity, so the default warning filter
    reports a configuration change once, not once per entity; ``.entity`` and ``.changes``
    (setting -> (snapshot value, current value)) say exactly what differs.
    """

    def __init__(self, entity: str, changes: dict[str, tuple[Any, Any]]) -> None:
        listed = "; ".join(f"{key} {old!r} -> {new!r}" for key, (old, new) in changes.items())
        super().__init__(f"snapshot taken with other settings: {listed}")
        self.entity = entity
        self.changes = changes


# -- writing --------------------------------------------------------------------------------------
def snapshot_entity(stream: EntityModel, offsets: dict[str, int] | None = None) -> bytes:
    """Serialise one entity, with the input ``offsets`` it covers (``{"topic/partition": next_offset}``)."""
    offsets = dict(offsets or {})
    if not all(isinstance(k, str) and type(v) is int and v >= 0 for k, v in offsets.items()):
        raise ValueError(f"offsets must map str to non-negative int, got {offsets!r}")
    state = stream.to_state()
    detector = state["detector"]
    meta = {
        "version": SNAPSHOT_VERSION,
        **{key: state[key] for key in ("entity", "names", "group_labels", "labels", "last_ts", "last_residual_norm",
                                       "ignored_metrics")},
        "samples": detector["samples"],
        "offsets": offsets,
        "incident": detector["tracker"]["incident"],
        "settings": _settings(stream.detector.config, stream.rules),
    }
    meta_bytes = json.dumps(meta, allow_nan=False, sort_keys=True, separators=(",", ":")).encode()
    arrays = _arrays(state)
    for key, (dtype, _) in _ARRAYS.items():   # plain dtypes only: nothing np.savez would pickle
        if arrays[key].dtype != np.dtype(dtype):
            raise ValueError(f"{key} is {arrays[key].dtype}, the format says {dtype}")
    archive = io.BytesIO()
    np.savez(archive, **arrays)   # (no allow_pickle keyword: numpy 1.26's savez would store it as an array)
    payload = meta_bytes + archive.getvalue()
    prefix = _PREFIX.pack(MAGIC, SNAPSHOT_VERSION, len(meta_bytes), len(payload) - len(meta_bytes))
    return prefix + hashlib.sha256(prefix + payload).digest() + payload


def _settings(config: DetectorConfig, rules: MetricRules) -> dict:
    """The configuration as plain JSON values (tuples become lists), as stored and compared."""
    return json.loads(json.dumps({"detector": dataclasses.asdict(config), "rules": dataclasses.asdict(rules)}))


def _arrays(state: dict) -> dict[str, np.ndarray]:
    """The arrays of a stream's :meth:`EntityModel.to_state` under their snapshot names (the rest,
    such as the incident and the sample count, is metadata)."""
    detector = state["detector"]
    groups = detector["groups"]
    arrays = {f"{part}.{name}": value for part in ("normaliser", "baseline", "probation", "tracker")
              for name, value in detector[part].items()}
    arrays.update((f"detector.{name}", detector[name])
                  for name in ("residual_scale", "tail_factor", "admitted", "warm_start", "warmup_rows"))
    arrays["detector.group_members"] = np.concatenate(groups) if groups else np.zeros(0, np.int64)
    arrays["detector.group_sizes"] = np.array([g.size for g in groups], dtype=np.int64)
    arrays["stream.last_seen"] = state["last_seen"]
    return {key: arrays[key] for key in _ARRAYS}


# -- reading --------------------------------------------------------------------------------------
def restore_entity(data: bytes, rules: MetricRules, config: DetectorConfig) -> tuple[EntityModel, dict[str, int]]:
    """Inverse of :func:`snapshot_entity`: the stream and its offsets, or :class:`SnapshotError`.

    ``rules`` and ``config`` are today's settings; if they differ from the snapshot's, a
    :class:`SettingsChanged` warning says how (the learned state is restored as saved).
    """
    meta, arrays = _unframe(data)
    stream, offsets = _build(meta, _load_arrays(arrays), rules, config)
    current = _settings(config, rules)
    saved = meta["settings"]
    if saved != current:
        changes = {key: (old, new) for key, old, new in _differences(saved, current)}
        warnings.warn(SettingsChanged(stream.entity, changes), stacklevel=2)
    return stream, offsets


def _unframe(data: bytes) -> tuple[dict, bytes]:
    """Check the frame and checksum; the parsed metadata and the raw array archive."""
    if not isinstance(data, (bytes, bytearray, memoryview)):
        raise SnapshotError(f"a snapshot is bytes, not {type(data).__name__}")
    data = bytes(data)
    if not data:
        raise SnapshotError("empty snapshot")
    if len(data) < HEADER_SIZE:
        raise SnapshotError(f"truncated snapshot: {len(data)} bytes, shorter than the {HEADER_SIZE}-byte header")
    magic, version, meta_len, arrays_len = _PREFIX.unpack_from(data)
    if magic != MAGIC:
        raise SnapshotError("not a shiftsieve snapshot (bad magic bytes)")
    if version != SNAPSHOT_VERSION:
        raise SnapshotError(f"unsupported snapshot version {version} (this build reads {SNAPSHOT_VERSION})")
    expected = HEADER_SIZE + meta_len + arrays_len
    if len(data) != expected:
        what = "truncated snapshot" if len(data) < expected else "trailing bytes after the snapshot"
        raise SnapshotError(f"{what}: {len(data)} bytes, the header declares {expected}")
    payload = data[HEADER_SIZE:]
    if hashlib.sha256(data[:_PREFIX.size] + payload).digest() != data[_PREFIX.size:HEADER_SIZE]:
        raise SnapshotError("checksum mismatch: the snapshot is corrupt")
    try:
        meta = json.loads(payload[:meta_len].decode("utf-8"), parse_constant=_no_constant)
    except (ValueError, RecursionError) as exc:   # JSONDecodeError, UnicodeDecodeError, NaN literals
        raise SnapshotError(f"unreadable metadata: {exc}") from exc
    if not isinstance(meta, dict):
        raise SnapshotError("metadata is not a JSON object")
    if meta.get("version") != version:
        raise SnapshotError(f"metadata version {meta.get('version')!r} differs from the header's {version}")
    return meta, payload[meta_len:]


def _no_constant(literal: str) -> None:
    raise ValueError(f"non-finite literal {literal}")


def _load_arrays(archive: bytes) -> dict[str, np.ndarray]:
    try:
        with zipfile.ZipFile(io.BytesIO(archive)) as zf:   # stored entries only: no decompression bombs
            if any(info.compress_type != zipfile.ZIP_STORED for info in zf.infolist()):
                raise SnapshotError("array archive has compressed entries (snapshots are written uncompressed)")
        npz = np.load(io.BytesIO(archive), allow_pickle=False)
        if not isinstance(npz, np.lib.npyio.NpzFile):
            raise SnapshotError("array archive is not an .npz archive")
        with npz:
            arrays = {name: npz[name] for name in npz.files}
    except SnapshotError:
        raise
    except Exception as exc:   # zipfile and numpy's readers raise many kinds on malformed archives
        raise SnapshotError(f"unreadable array archive: {type(exc).__name__}: {exc}") from exc
    missing, extra = set(_ARRAYS) - set(arrays), set(arrays) - set(_ARRAYS)
    if missing or extra:
        raise SnapshotError(f"array archive lacks {sorted(missing)} / has unexpected {sorted(extra)}")
    return arrays


def _field(meta: dict, key: str, kind: type) -> Any:
    value = meta.get(key)
    if not isinstance(value, kind) or (kind is int and isinstance(value, bool)):
        raise SnapshotError(f"metadata {key!r} is {type(value).__name__}, expected {kind.__name__}")
    return value


def _strings(value: Any, key: str) -> list[str]:
    if not isinstance(value, list) or not all(isinstance(v, str) for v in value):
        raise SnapshotError(f"metadata {key!r} must be a list of strings")
    return value


def _indices(value: Any, key: str, limit: int) -> set[int]:
    """A list of distinct column indices below ``limit``."""
    if not isinstance(value, list) or not all(type(v) is int and 0 <= v < limit for v in value) \
            or len(set(value)) != len(value):
        raise SnapshotError(f"{key} must be distinct indices in 0..{limit - 1}")
    return set(value)


def _build(meta: dict, arrays: dict[str, np.ndarray], rules: MetricRules,
           config: DetectorConfig) -> tuple[EntityModel, dict[str, int]]:
    entity = _field(meta, "entity", str)
    names = _strings(meta.get("names"), "names")
    group_labels = _strings(meta.get("group_labels"), "group_labels")
    if len(set(names)) != len(names):
        raise SnapshotError("metadata 'names' has duplicates")
    labels = _field(meta, "labels", dict)
    offsets = _field(meta, "offsets", dict)
    if not all(isinstance(v, str) for v in labels.values()):
        raise SnapshotError("metadata 'labels' must map strings to strings")
    if not all(type(v) is int and v >= 0 for v in offsets.values()):
        raise SnapshotError("metadata 'offsets' must map strings to non-negative integers")
    samples, ignored = _field(meta, "samples", int), _field(meta, "ignored_metrics", int)
    last_ts, residual_norm = meta.get("last_ts"), meta.get("last_residual_norm")
    if samples < 0 or ignored < 0 or not all(x is None or type(x) in (int, float) for x in (last_ts, residual_norm)):
        raise SnapshotError("metadata 'samples', 'ignored_metrics', 'last_ts' or 'last_residual_norm' is invalid")
    if not isinstance(meta.get("settings"), dict):
        raise SnapshotError("metadata 'settings' is missing")

    n, g = len(names), len(group_labels)
    dims = {"n": n, "g": g, "p": n + g}
    for key, (dtype, shape) in _ARRAYS.items():
        a = arrays[key]
        if a.dtype != np.dtype(dtype) or a.ndim != len(shape):
            raise SnapshotError(f"array {key} is {a.dtype} with {a.ndim} dimensions, expected {dtype} {shape}")
        for symbol, size in zip(shape, a.shape):
            if dims.setdefault(symbol, size) != size:
                raise SnapshotError(f"array {key} has shape {a.shape}, inconsistent with {symbol} = {dims[symbol]}")
    sizes, members = arrays["detector.group_sizes"], arrays["detector.group_members"]
    if (sizes < 1).any() or sizes.sum() != members.size or ((members < 0) | (members >= n)).any():
        raise SnapshotError("group members are inconsistent with the metrics")
    groups = np.split(members, np.cumsum(sizes)[:-1]) if g else []
    if any(np.unique(grp).size != grp.size for grp in groups):
        raise SnapshotError("a group lists a metric twice")
    on_probation = arrays["probation.metric"]
    _indices(on_probation.tolist(), "probation metrics", n)
    if (arrays["probation.count"] < 0).any() or not np.isin(arrays["tracker.state"], (0, 1, 2)).all():
        raise SnapshotError("probation counts or alert states out of range")
    rows = arrays["detector.warmup_rows"]
    if dims["r"] and rows.shape[0]:
        raise SnapshotError("warm-up rows held after the baseline was fitted")
    if rows.shape[0] > config.warmup:
        raise SnapshotError(f"snapshot holds {rows.shape[0]} warm-up rows, more than this configuration's "
                            f"warmup = {config.warmup}: restart the entity instead")
    incident = meta.get("incident")
    if incident is not None:
        if not isinstance(incident, dict) or type(incident.get("onset_ts")) not in (int, float):
            raise SnapshotError("metadata 'incident' is invalid")
        incident = {"onset_ts": float(incident["onset_ts"]),
                    "members": sorted(_indices(incident.get("members"), "incident members", n + g)),
                    "resolved": sorted(_indices(incident.get("resolved"), "resolved metrics", n + g))}

    detector = _part(arrays, "detector")
    del detector["group_members"], detector["group_sizes"]
    detector.update({part: _part(arrays, part) for part in ("normaliser", "baseline", "probation", "tracker")},
                    groups=groups, samples=samples)
    detector["tracker"]["incident"] = incident
    state = {"entity": entity, "names": names, "group_labels": group_labels, "labels": labels, "last_ts": last_ts,
             "last_residual_norm": residual_norm, "ignored_metrics": ignored, "last_seen": arrays["stream.last_seen"],
             "detector": detector}
    return EntityModel.from_state(state, rules, config), offsets


def _part(arrays: dict[str, np.ndarray], part: str) -> dict[str, np.ndarray]:
    """The arrays named ``part.field``, by field."""
    return {key[len(part) + 1:]: value for key, value in arrays.items() if key.startswith(part + ".")}


def _differences(old: Any, new: Any, key: str = "") -> list[tuple[str, Any, Any]]:
    """(dotted key, old, new) for every leaf of two nested JSON objects that differs."""
    if isinstance(old, dict) and isinstance(new, dict):
        return [d for k in sorted(old.keys() | new.keys())
                for d in _differences(old.get(k), new.get(k), f"{key}.{k}" if key else k)]
    return [] if old == new else [(key, old, new)]


# -- the state directory --------------------------------------------------------------------------
class StateDirectory:
    """One snapshot file per entity under ``path``, each replaced atomically.

    File names are ``e-<hex of the UTF-8 entity>.snap``, or ``h-<SHA-256 of it>.snap`` when the
    hex would be too long for a file name (the entity is then read from the file).  Other files,
    and the dot-prefixed temporary files of interrupted writes, are ignored.
    """

    SUFFIX = ".snap"
    MAX_HEX = 200   # characters; file names stay well under the usual 255-byte limit

    def __init__(self, path: str | os.PathLike) -> None:
        self.path = Path(path)
        self.path.mkdir(parents=True, exist_ok=True)

    def file_for(self, entity: str) -> Path:
        """The snapshot file of ``entity``."""
        raw = entity.encode("utf-8", "surrogatepass")
        stem = f"e-{raw.hex()}" if 2 * len(raw) <= self.MAX_HEX else f"h-{hashlib.sha256(raw).hexdigest()}"
        return self.path / (stem + self.SUFFIX)

    def save(self, stream: EntityModel, offsets: dict[str, int] | None = None) -> Path:
        """Write ``stream``'s snapshot: temporary file, fsync, rename over the old one, fsync the directory."""
        target = self.file_for(stream.entity)
        data = snapshot_entity(stream, offsets)
        fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=self.path)
        try:
            with os.fdopen(fd, "wb") as f:
                f.write(data)
                f.flush()
                os.fsync(f.fileno())
            os.replace(tmp, target)
        except BaseException:
            Path(tmp).unlink(missing_ok=True)
            raise
        dir_fd = os.open(self.path, os.O_RDONLY)
        try:
            os.fsync(dir_fd)
        finally:
            os.close(dir_fd)
        return target

    def load(self, entity: str, rules: MetricRules,
             config: DetectorConfig) -> tuple[EntityModel, dict[str, int]] | None:
        """``entity``'s stream and offsets, ``None`` without a snapshot, SnapshotError naming a bad file."""
        path = self.file_for(entity)
        try:
            data = path.read_bytes()
        except FileNotFoundError:
            return None
        return self._restore(path, data, rules, config)

    def entities(self) -> list[str]:
        """The entities with a snapshot, sorted; SnapshotError for a hash-named file that is unreadable."""
        return sorted(self._entity_in(path) if entity is None else entity for path, entity in self._files())

    def _files(self) -> list[tuple[Path, str | None]]:
        """Snapshot files whose names this class could have written, with the entity their name
        encodes (``None`` for hash names)."""
        out = []
        for path in sorted(self.path.iterdir()):
            kind, stem = path.name[:2], path.name[2:-len(self.SUFFIX)]
            if not path.name.endswith(self.SUFFIX) or not path.is_file():
                continue
            try:
                if kind == "e-":
                    out.append((path, bytes.fromhex(stem).decode("utf-8", "surrogatepass")))
                elif kind == "h-" and len(stem) == 64 and int(stem, 16) >= 0:
                    out.append((path, None))
            except ValueError:   # not hex, or hex of something that is not UTF-8
                continue
        return out

    @staticmethod
    def _read(path: Path) -> bytes:
        try:
            return path.read_bytes()
        except OSError as exc:
            raise SnapshotError(f"{path}: unreadable: {exc}") from exc

    def _entity_in(self, path: Path) -> str:
        try:
            entity = _unframe(self._read(path))[0].get("entity")
        except SnapshotError as exc:
            raise SnapshotError(f"{path}: {exc}") from exc
        if not isinstance(entity, str) or self.file_for(entity) != path:
            raise SnapshotError(f"{path}: the file name does not match the entity it holds")
        return entity

    def _restore(self, path: Path, data: bytes, rules: MetricRules,
                 config: DetectorConfig) -> tuple[EntityModel, dict[str, int]]:
        try:
            stream, offsets = restore_entity(data, rules, config)
        except SnapshotError as exc:
            raise SnapshotError(f"{path}: {exc}") from exc
        if self.file_for(stream.entity) != path:
            raise SnapshotError(f"{path}: holds entity {stream.entity!r}, "
                                f"whose file is {self.file_for(stream.entity).name}")
        return stream, offsets

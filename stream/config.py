"""Configuration: one TOML file, every key overridable by ``SHIFTSIEVE_<SECTION>_<KEY>``.

The schema below is the single source of truth for keys, types, defaults and
allowed ranges; ``shiftsieve config check`` prints the effective values from it.
Every invalid value produces a :class:`ConfigError` whose message is one line
naming the key and what is allowed.
"""

from __future__ import annotations

import math
import os
import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Mapping

from shiftsieve.models.decision import DecisionConfig
from shiftsieve.models.detector import DetectorConfig

ENV_PREFIX = "SHIFTSIEVE_"
#: SHIFTSIEVE_ variables that are not configuration: the test harness's (tests/conftest.py; CI
#: exports SHIFTSIEVE_REQUIRE_BROKER=1). Without this every load_config() from os.environ in CI
#: failed with "unknown environment variable SHIFTSIEVE_REQUIRE_BROKER".
NOT_CONFIG_ENV = frozenset({"SHIFTSIEVE_REQUIRE_BROKER", "SHIFTSIEVE_TANSU_BIN"})


class ConfigError(ValueError):
    """An invalid configuration; ``str()`` is a one-line message naming the key."""


@dataclass(frozen=True)
class Setting:
    section: str
    key: str
    kind: type  # int, float, str, bool, list (of str), dict (str -> list of str)
    default: Any
    allowed: str  # human description of the allowed values, used in error messages
    check: Callable[[Any], bool]
    help: str

    @property
    def env(self) -> str:
        return f"{ENV_PREFIX}{self.section.upper()}_{self.key.upper()}"


def _range(lo: float, hi: float, *, lo_open: bool = False, hi_open: bool = False) -> Callable[[Any], bool]:
    def check(v: Any) -> bool:
        above = v > lo if lo_open else v >= lo
        below = v < hi if hi_open else v <= hi
        return math.isfinite(v) and above and below
    return check


def _patterns(v: Any) -> bool:
    return all(isinstance(p, str) and p for p in v)


def _groups(v: Any) -> bool:
    return all(isinstance(k, str) and k and isinstance(p, list) and p and _patterns(p) for k, p in v.items())


def _one_of(*choices: str) -> Callable[[Any], bool]:
    return lambda v: v in choices


def _api_version(v: Any) -> bool:
    parts = v.split(".")
    return v == "auto" or (len(parts) == 3 and all(p.isdigit() for p in parts))


SECRETS = {("kafka", "sasl_password")}
#: The input encodings a source can carry (source.encoding, and what `shiftsieve produce` writes).
ENCODINGS = ("vector", "sample", "otlp_json")


def _kafka_topic_or_empty(v: Any) -> bool:
    # Kafka's own topic-name rule (1-249 of A-Z a-z 0-9 . _ -, not . or ..), as kafka.py checks it
    # when the sink sends: a bad name fails here, at `config check`, not at the first alert.
    from .kafka import _check_topic  # noqa: PLC0415  (kafka.py imports kafka-python lazily: cheap)
    if v == "":
        return True
    try:
        _check_topic(v)
    except ValueError:
        return False
    return True


def _source_url(v: Any) -> bool:
    # A kafka:// URL (the service's test for "this is Kafka") must parse here, so `config check`
    # rejects it with the key named instead of `shiftsieve run` failing on it later.
    if not v.strip():
        return False
    if v.startswith("kafka://"):
        from .kafka import parse_kafka_url  # noqa: PLC0415
        try:
            parse_kafka_url(v)
        except ValueError:
            return False
    return True


def _listen(v: Any) -> bool:
    host, sep, port = v.rpartition(":")
    return bool(sep) and port.isdigit() and 0 <= int(port) <= 65535


SCHEMA: tuple[Setting, ...] = (
    Setting("model", "warmup", int, 540, "an integer in 10..100000", _range(10, 100_000),
            "vectors an entity collects before it is scored"),
    Setting("model", "rank", int, 0, "an integer in 0..64 (0 = choose by energy)", _range(0, 64),
            "rank of the baseline subspace; 0 chooses it at warm-up from `energy` capped at `max_rank`"),
    Setting("model", "energy", float, 0.99, "a number in (0, 1]", _range(0, 1, lo_open=True),
            "share of warm-up energy the chosen rank explains"),
    Setting("model", "max_rank", int, 8, "an integer in 1..64", _range(1, 64), "cap on the chosen rank"),
    Setting("model", "baseline_halflife", float, 1440.0, "a number of samples in (0, 1e9]",
            _range(0, 1e9, lo_open=True), "samples after which a vector's weight in the baseline halves"),
    Setting("model", "normaliser_halflife", float, 1440.0, "a number of samples in (0, 1e9]",
            _range(0, 1e9, lo_open=True), "half-life of each metric's location and scale"),
    Setting("model", "scale_halflife", float, 720.0, "a number of samples in (0, 1e9]",
            _range(0, 1e9, lo_open=True), "half-life of each metric's residual scale"),
    Setting("model", "false_alarm", float, 1e-3, "a probability in (0, 0.5)", _range(0, 0.5, lo_open=True, hi_open=True),
            "target probability that a quiet metric's sample is flagged (sets lambda)"),
    Setting("model", "tol", float, 1e-4, "a number in (0, 0.1]", _range(0, 0.1, lo_open=True),
            "solver tolerance: duality gap relative to ||P z||^2"),
    Setting("model", "max_iter", int, 300, "an integer in 1..100000", _range(1, 100_000),
            "solver iteration cap per sample"),
    Setting("model", "min_samples", int, 30, "an integer in 2..100000", _range(2, 100_000),
            "samples a new metric needs before it enters the model"),
    Setting("model", "group_weight", float, 1.0, "a number in (0, 100]", _range(0, 100, lo_open=True),
            "penalty of a group column relative to a single metric"),
    Setting("model", "log_metrics", list, ["*_ms", "*_seconds", "*_bytes"], "a list of non-empty glob patterns",
            _patterns, "metrics (by name pattern) modelled on a symmetric log scale"),
    Setting("model", "groups", dict, {}, "a table of group name -> non-empty list of glob patterns", _groups,
            "group columns: metrics matching a group's patterns can shift as one coefficient"),
    Setting("model", "group_by", list, [], "a list of label names", _patterns,
            "group columns from labels: metrics sharing a value of one of these labels (written in the "
            "metric name as name{label=\"value\"}) can shift as one coefficient"),
    Setting("decision", "confirm_k", int, 3, "an integer in 1..63, at most confirm_m", _range(1, 63),
            "active samples needed among the last confirm_m to fire"),
    Setting("decision", "confirm_m", int, 5, "an integer in 1..63", _range(1, 63), "confirmation window"),
    Setting("decision", "clear_sigma", float, 2.0, "a number in [0, 100]", _range(0, 100),
            "a firing metric clears when its statistic stays below this many residual sigmas"),
    Setting("decision", "clear_after", int, 5, "an integer in 1..100000", _range(1, 100_000),
            "consecutive quiet samples needed to clear"),
    Setting("decision", "adapt_after", int, 1440, "an integer in 0..10000000 (0 = never)", _range(0, 10_000_000),
            "samples a shift may fire before it is accepted as the new normal"),
    Setting("engine", "batch_size", int, 64, "an integer in 1..4096", _range(1, 4096),
            "vectors per entity in one micro-batch (replay); live batches follow the polls"),
    Setting("engine", "max_entities", int, 100_000, "an integer in 1..10000000", _range(1, 10_000_000),
            "entities one process tracks; vectors of further entities are rejected"),
    Setting("engine", "max_delay_seconds", float, 0.2, "a number of seconds in [0, 60]", _range(0, 60),
            "while `shiftsieve run` is behind its input, the longest a vector waits for more of its "
            "entity's vectors to batch with (full batches of engine.batch_size run at once; once caught "
            "up, every poll runs at once)"),
    Setting("engine", "max_resident", int, 0, "an integer in 0..10000000 (0 = no limit)", _range(0, 10_000_000),
            "models kept in memory by `shiftsieve run`: after each poll the least recently seen entities "
            "beyond it are evicted (snapshotted first with state.directory, and restored when they return; "
            "without it they warm up again)"),
    Setting("engine", "max_metrics", int, 5000, "an integer in 1..100000", _range(1, 100_000),
            "metrics one entity tracks; further names are ignored and counted"),
    Setting("engine", "drop_after", int, 1440, "an integer in 1..10000000", _range(1, 10_000_000),
            "samples a metric may be absent before it is dropped from its entity"),
    Setting("source", "url", str, "-", "kafka://HOST:PORT[,HOST:PORT]/TOPIC?group=NAME, a file path, or - (stdin)",
            _source_url, "where `shiftsieve run` reads vector messages"),
    Setting("source", "encoding", str, "vector", "one of " + ", ".join(ENCODINGS), _one_of(*ENCODINGS),
            "message encoding: the vector message, one sample per message, or OpenTelemetry OTLP/JSON"),
    Setting("source", "entity_labels", list, ["service", "instance"], "a non-empty list of label names",
            lambda v: bool(v) and _patterns(v),
            "labels whose values name the entity (sample and otlp_json, and replay of a Prometheus .json)"),
    Setting("source", "step_seconds", float, 30.0, "a number of seconds in (0, 86400]", _range(0, 86400, lo_open=True),
            "samples are assembled into one vector per entity and step (sample and otlp_json)"),
    Setting("source", "allowed_lateness_seconds", float, 60.0, "a number of seconds in [0, 86400]", _range(0, 86400),
            "how long a step stays open for late samples before its vector is emitted"),
    Setting("kafka", "api_version", str, "auto", "auto or a version such as 2.5.0", _api_version,
            "Kafka protocol version the client speaks (auto = negotiate)"),
    Setting("kafka", "security_protocol", str, "PLAINTEXT", "one of PLAINTEXT, SSL, SASL_PLAINTEXT, SASL_SSL",
            _one_of("PLAINTEXT", "SSL", "SASL_PLAINTEXT", "SASL_SSL"), "Kafka security protocol"),
    Setting("kafka", "sasl_mechanism", str, "", "empty, PLAIN, SCRAM-SHA-256 or SCRAM-SHA-512",
            _one_of("", "PLAIN", "SCRAM-SHA-256", "SCRAM-SHA-512"), "SASL mechanism"),
    Setting("kafka", "sasl_username", str, "", "a string", lambda v: True, "SASL user name"),
    Setting("kafka", "sasl_password", str, "", "a string", lambda v: True,
            "SASL password (prefer sasl_password_file or the environment; never printed)"),
    Setting("kafka", "sasl_password_file", str, "", "a file path or empty", lambda v: True,
            "file holding the SASL password (e.g. a mounted secret)"),
    Setting("kafka", "ssl_cafile", str, "", "a file path or empty", lambda v: True, "CA bundle for TLS"),
    Setting("kafka", "ssl_certfile", str, "", "a file path or empty", lambda v: True, "client certificate for TLS"),
    Setting("kafka", "ssl_keyfile", str, "", "a file path or empty", lambda v: True, "client key for TLS"),
    Setting("kafka", "session_timeout_ms", int, 10_000, "an integer in 1000..300000", _range(1000, 300_000),
            "consumer-group session timeout: how fast a dead member's partitions move"),
    Setting("kafka", "fetch_partition_bytes", int, 8 << 20, "an integer in 65536..268435456",
            _range(1 << 16, 1 << 28),
            "most bytes one fetch returns per partition (at least one message is always returned): "
            "bigger fetches mean fewer round trips when behind, at that much memory per assigned partition"),
    Setting("kafka", "alert_topic", str, "", "a topic name (1-249 of A-Z a-z 0-9 . _ -) or empty",
            _kafka_topic_or_empty, "topic for alert events (empty = none)"),
    Setting("kafka", "dead_letter_topic", str, "", "a topic name (1-249 of A-Z a-z 0-9 . _ -) or empty",
            _kafka_topic_or_empty,
            "topic for rejected messages with a reason header (empty = the --dead-letter file only)"),
    Setting("state", "directory", str, "", "a directory path or empty", lambda v: True,
            "where per-entity model snapshots are kept (empty = no snapshots)"),
    Setting("state", "snapshot_seconds", float, 30.0, "a number of seconds in (0, 86400]",
            _range(0, 86400, lo_open=True), "how often snapshots are written (offsets are committed after)"),
    Setting("http", "listen", str, "127.0.0.1:9471", "HOST:PORT with a port in 0..65535", _listen,
            "address of /metrics, /healthz and /readyz (loopback by default: expose it on purpose)"),
    Setting("http", "max_series", int, 10_000, "an integer in 10..10000000", _range(10, 10_000_000),
            "cap on exported per-entity and per-shift series; the rest are counted as withheld"),
    Setting("http", "poll_seconds", float, 0.5, "a number of seconds in (0, 60]", _range(0, 60, lo_open=True),
            "longest wait for input in one poll (also bounds how long SIGTERM takes)"),
    Setting("input", "max_message_bytes", int, 1 << 20, "an integer in 64..67108864", _range(64, 1 << 26),
            "largest accepted message or line"),
    Setting("input", "max_file_bytes", int, 64 << 20, "an integer in 1024..4294967296", _range(1024, 1 << 32),
            "largest whole-document replay input (a Prometheus range-query .json, decompressed size), "
            "read into memory at once (parsed, it takes several times this)"),
    Setting("input", "max_metrics_per_message", int, 10_000, "an integer in 1..1000000", _range(1, 1_000_000),
            "most metrics accepted in one vector"),
)

_BY_NAME = {(s.section, s.key): s for s in SCHEMA}


class Config:
    """Validated settings, read as ``config.model.warmup`` or ``config.get("model", "warmup")``."""

    def __init__(self, values: Mapping[tuple[str, str], Any], sources: Mapping[tuple[str, str], str]) -> None:
        self._values = dict(values)
        self.sources = dict(sources)

    def get(self, section: str, key: str) -> Any:
        return self._values[(section, key)]

    def __getattr__(self, section: str) -> Any:
        if section.startswith("_") or section in ("sources",):
            raise AttributeError(section)
        keys = {k: v for (s, k), v in self._values.items() if s == section}
        if not keys:
            raise AttributeError(f"no config section {section!r}")
        return _Section(keys)

    def items(self) -> list[tuple[Setting, Any, str]]:
        return [(s, self._values[(s.section, s.key)], self.sources[(s.section, s.key)]) for s in SCHEMA]

    def detector_config(self) -> DetectorConfig:
        m, d = self.model, self.decision
        return DetectorConfig(
            warmup=m.warmup, rank=m.rank or None, energy=m.energy, max_rank=m.max_rank,
            baseline_halflife=m.baseline_halflife, normaliser_halflife=m.normaliser_halflife,
            scale_halflife=m.scale_halflife, false_alarm=m.false_alarm, group_weight=m.group_weight,
            min_samples=m.min_samples, tol=m.tol, max_iter=m.max_iter,
            decision=DecisionConfig(confirm_k=d.confirm_k, confirm_m=d.confirm_m, clear_sigma=d.clear_sigma,
                                    clear_after=d.clear_after, adapt_after=d.adapt_after))


class _Section:
    def __init__(self, values: dict[str, Any]) -> None:
        self.__dict__.update(values)


def _shown(setting: Setting, value: Any) -> str:
    """The offending value as an error message shows it: secrets masked, long values cut (one short line)."""
    if (setting.section, setting.key) in SECRETS:
        return "***"  # a mistyped secret is still a secret: never echo it into logs or terminals
    text = repr(value)
    return text if len(text) <= 80 else text[:77] + "..."


def _coerce(setting: Setting, value: Any, origin: str) -> Any:
    name = f"{setting.section}.{setting.key}"
    kind = setting.kind
    ok_type = {
        int: isinstance(value, int) and not isinstance(value, bool),
        float: isinstance(value, (int, float)) and not isinstance(value, bool),
        str: isinstance(value, str),
        bool: isinstance(value, bool),
        list: isinstance(value, list),
        dict: isinstance(value, dict),
    }[kind]
    if not ok_type:
        raise ConfigError(f"{name} ({origin}): expected {setting.allowed}, got {_shown(setting, value)}")
    try:
        if kind is float:
            value = float(value)
        ok = setting.check(value)
    except (OverflowError, TypeError, ValueError):
        # e.g. an integer too large for a float (TOML integers are unbounded in tomllib): out of range,
        # not a traceback
        ok = False
    if not ok:
        raise ConfigError(f"{name} ({origin}): expected {setting.allowed}, got {_shown(setting, value)}")
    return value


def _parse_env(setting: Setting, text: str) -> Any:
    """Environment values are TOML values (``0.01``, ``["a_*"]``, ``{x = ["y"]}``); bare words are strings.

    For string settings anything that is not a TOML string literal is taken as it stands, so a
    user name, path or topic such as ``12345`` or ``true`` stays a string; secrets are always
    taken verbatim (a password is whatever the secret store injected, quotes included).
    """
    if (setting.section, setting.key) in SECRETS:
        return text
    try:
        value = tomllib.loads(f"v = {text}")["v"]
    except tomllib.TOMLDecodeError:
        if setting.kind is str:
            return text
        raise ConfigError(f"{setting.section}.{setting.key} ({setting.env}): expected {setting.allowed}, "
                          f"got {_shown(setting, text)}") from None
    if setting.kind is str and not isinstance(value, str):
        return text
    return value


def load_config(path: str | os.PathLike | None = None, environ: Mapping[str, str] | None = None) -> Config:
    """Defaults, then the TOML file (if any), then ``SHIFTSIEVE_<SECTION>_<KEY>`` variables."""
    environ = os.environ if environ is None else environ
    values = {(s.section, s.key): s.default for s in SCHEMA}
    sources = {(s.section, s.key): "default" for s in SCHEMA}
    if path is not None:
        file_values = _read_toml(Path(path))
        for section, table in file_values.items():
            if not isinstance(table, dict):
                raise ConfigError(f"{path}: top-level key {section!r} must be a [section] table")
            if not any(s == section for s, _ in _BY_NAME):   # also an empty [typo] table
                raise ConfigError(f"{path}: unknown section [{section}] "
                                  f"(known sections: {', '.join(sorted({s for s, _ in _BY_NAME}))})")
            for key, value in table.items():
                setting = _BY_NAME.get((section, key))
                if setting is None:
                    known = sorted(k for s, k in _BY_NAME if s == section)
                    hint = f"known keys: {', '.join(known)}" if known else \
                        f"known sections: {', '.join(sorted({s for s, _ in _BY_NAME}))}"
                    raise ConfigError(f"{path}: unknown key {section}.{key} ({hint})")
                values[(section, key)] = _coerce(setting, value, str(path))
                sources[(section, key)] = str(path)
    for setting in SCHEMA:
        if setting.env in environ:
            values[(setting.section, setting.key)] = _coerce(setting, _parse_env(setting, environ[setting.env]),
                                                             setting.env)
            sources[(setting.section, setting.key)] = setting.env
    unknown = sorted(k for k in environ if k.startswith(ENV_PREFIX) and k not in {s.env for s in SCHEMA}
                     and k not in NOT_CONFIG_ENV)
    if unknown:
        raise ConfigError(f"unknown environment variable {unknown[0]} (see `shiftsieve config check`)")
    if values[("decision", "confirm_k")] > values[("decision", "confirm_m")]:
        raise ConfigError(f"decision.confirm_k: expected at most decision.confirm_m "
                          f"({values[('decision', 'confirm_m')]}), got {values[('decision', 'confirm_k')]}")
    _check_kafka(values, sources)
    return Config(values, sources)


def _check_kafka(values: dict[tuple[str, str], Any], sources: dict[tuple[str, str], str]) -> None:
    """The [kafka] files and cross-field rules, checked here so `config check` reports them.

    The rules are the ones `KafkaSettings` enforces (stream/kafka.py) when `shiftsieve run` builds
    its clients; there they surface as a ValueError only when the service starts. The password
    file is read here: a missing or unreadable one is a one-line error naming the key, and its
    content becomes the effective ``kafka.sasl_password`` (masked by :func:`render`).
    """
    def where(key: str) -> str:
        return f"kafka.{key} ({sources[('kafka', key)]})"

    for key in ("sasl_password_file", "ssl_cafile", "ssl_certfile", "ssl_keyfile"):
        name = values[("kafka", key)]
        if not name:
            continue
        try:
            with open(name, "rb") as f:   # the TLS files only need to be readable; the password is read
                content = f.read() if key == "sasl_password_file" else b""
        except OSError as exc:   # the message names the path, never file content
            raise ConfigError(f"{where(key)}: cannot read {name}: {exc.strerror or type(exc).__name__}") from None
        if key == "sasl_password_file":
            try:
                password = content.decode("utf-8").strip()   # as stream.service.kafka_settings reads it
            except UnicodeDecodeError:
                raise ConfigError(f"{where(key)}: {name} is not UTF-8 text") from None
            if not password:
                raise ConfigError(f"{where(key)}: {name} is empty: expected the SASL password")
            values[("kafka", "sasl_password")] = password
            sources[("kafka", "sasl_password")] = f"kafka.sasl_password_file ({sources[('kafka', key)]})"
    protocol, mechanism = values[("kafka", "security_protocol")], values[("kafka", "sasl_mechanism")]
    if protocol.startswith("SASL_"):
        if not mechanism:
            raise ConfigError(f"{where('sasl_mechanism')}: expected PLAIN, SCRAM-SHA-256 or SCRAM-SHA-512 "
                              f"with kafka.security_protocol {protocol}, got ''")
        if not values[("kafka", "sasl_username")]:
            raise ConfigError(f"{where('sasl_username')}: expected a user name with kafka.security_protocol "
                              f"{protocol}, got ''")
        if not values[("kafka", "sasl_password")]:
            raise ConfigError(f"kafka.sasl_password: expected a password with kafka.security_protocol {protocol} "
                              f"(kafka.sasl_password, kafka.sasl_password_file or SHIFTSIEVE_KAFKA_SASL_PASSWORD)")
    elif mechanism:
        raise ConfigError(f"{where('sasl_mechanism')}: expected empty with kafka.security_protocol {protocol} "
                          f"(SASL needs SASL_PLAINTEXT or SASL_SSL), got {mechanism!r}")


def _read_toml(path: Path) -> dict[str, Any]:
    try:
        with path.open("rb") as f:
            return tomllib.load(f)
    except FileNotFoundError:
        raise ConfigError(f"config file not found: {path}") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(f"cannot read config file {path}: {exc}") from None
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{path}: invalid TOML: {exc}") from None


def render(config: Config) -> str:
    """The effective configuration as TOML, each value annotated with where it came from."""
    lines: list[str] = []
    section = None
    for setting, value, source in config.items():
        if setting.section != section:
            section = setting.section
            lines.append(f"{'' if not lines else chr(10)}[{section}]")
        shown = "\"***\"" if (setting.section, setting.key) in SECRETS and value else _toml_value(value)
        lines.append(f"{setting.key} = {shown}  # {source}; {setting.help}")
    return "\n".join(lines) + "\n"


def _toml_value(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return '"' + value.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(value, list):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    if isinstance(value, dict):
        return "{" + ", ".join(f"{_toml_value(k)} = {_toml_value(v)}" for k, v in value.items()) + "}"
    return repr(value)

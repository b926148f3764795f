"""Configuration: one TOML file, every key overridable by ``SHIFTSIEVE_<SECTION>_<KEY>``.

The section dataclasses below are the single source of keys, types, defaults and allowed
ranges (declared with :func:`.schema.setting`); :data:`SCHEMA`, ``shiftsieve config check`` and
the environment variable names are derived from them. Where a section feeds a model's own
configuration (``DetectorConfig``, ``DecisionConfig``) the default is the model's, read from
its dataclass, so the library and the command line cannot disagree. Every invalid value
produces a :class:`ConfigError` whose message is one line naming the key and what is allowed.
"""

from __future__ import annotations

import copy
import os
import tomllib
from dataclasses import asdict, dataclass, field, fields
from pathlib import Path
from typing import Any, Mapping

from shiftsieve.models.decision import DecisionConfig
from shiftsieve.models.detector import DetectorConfig

from .assemble import MetricRules
from .decode import DecodeLimits
from .kafka import SASL_MECHANISMS, SECURITY_PROTOCOLS, KafkaSettings, check_topic, parse_kafka_url
from .readers import DEFAULT_MAX_FILE_BYTES
from .schema import (ENV_PREFIX, ConfigError, Range, Setting, coerce, derive_schema, parse_env, section_types,
                     setting, toml_value)

__all__ = ["ENCODINGS", "ENV_PREFIX", "NOT_CONFIG_ENV", "SCHEMA", "SECTIONS", "Config", "ConfigError", "Setting",
           "load_config", "render"]

#: SHIFTSIEVE_ variables that are not configuration: the test harness's (tests/conftest.py; CI
#: exports SHIFTSIEVE_REQUIRE_BROKER=1). Without this every load_config() from os.environ in CI
#: failed with "unknown environment variable SHIFTSIEVE_REQUIRE_BROKER".
NOT_CONFIG_ENV = frozenset({"SHIFTSIEVE_REQUIRE_BROKER", "SHIFTSIEVE_TANSU_BIN"})
#: The input encodings a source can carry (source.encoding, and what `shiftsieve produce` writes).
ENCODINGS = ("vector", "sample", "otlp_json")
_SAMPLES = "a number of samples"
_SECONDS = "a number of seconds"
_TOPIC = "a topic name (1-249 of A-Z a-z 0-9 . _ -) or empty"

#: Keys that moved to another section: an old configuration is told where its key went.
MOVED = {("http", "poll_seconds"): "source.poll_seconds"}


def _patterns(v: Any) -> bool:
    return all(isinstance(p, str) and p for p in v)


def _labels(v: Any) -> bool:
    return bool(v) and _patterns(v)


def _groups(v: Any) -> bool:
    return all(isinstance(k, str) and k and isinstance(p, list) and p and _patterns(p) for k, p in v.items())


def _api_version(v: Any) -> bool:
    parts = v.split(".")
    return v == "auto" or (len(parts) == 3 and all(p.isdigit() for p in parts))


def _kafka_topic_or_empty(v: Any) -> bool:
    # Kafka's own topic-name rule (1-249 of A-Z a-z 0-9 . _ -, not . or ..), as the kafka package
    # checks it when the sink sends: a bad name fails here, at `config check`, not at the first alert.
    if v == "":
        return True
    try:
        check_topic(v)
    except ValueError:
        return False
    return True


def _source_url(v: Any) -> bool:
    # A kafka:// URL (the service's test for "this is Kafka") must parse here, so `config check`
    # rejects it with the key named instead of `shiftsieve run` failing on it later.
    if not v.strip():
        return False
    if v.startswith("kafka://"):
        try:
            parse_kafka_url(v)
        except ValueError:
            return False
    return True


def _listen(v: Any) -> bool:
    host, sep, port = v.rpartition(":")
    return bool(sep) and port.isdigit() and 0 <= int(port) <= 65535


def _either(choices: tuple[str, ...]) -> str:
    """``a, b or c``."""
    return ", ".join(choices[:-1]) + " or " + choices[-1]


@dataclass(frozen=True)
class ModelSection:
    """[model]: the detector's settings; the defaults are ``DetectorConfig``'s."""

    warmup: int = setting(DetectorConfig.warmup, Range(10, 100_000),
                          help="vectors an entity collects before it is scored")
    rank: int = setting(DetectorConfig.rank or 0, Range(0, 64), note=" (0 = choose by energy)",   # None -> 0
                        help="rank of the baseline subspace; 0 chooses it at warm-up from `energy` capped at "
                             "`max_rank`")
    energy: float = setting(DetectorConfig.energy, Range(0, 1, lo_open=True),
                            help="share of warm-up energy the chosen rank explains")
    max_rank: int = setting(DetectorConfig.max_rank, Range(1, 64), help="cap on the chosen rank")
    baseline_halflife: float = setting(DetectorConfig.baseline_halflife, Range(0, 1e9, lo_open=True), noun=_SAMPLES,
                                       help="samples after which a vector's weight in the baseline halves")
    normaliser_halflife: float = setting(DetectorConfig.normaliser_halflife, Range(0, 1e9, lo_open=True),
                                         noun=_SAMPLES, help="half-life of each metric's location and scale")
    scale_halflife: float = setting(DetectorConfig.scale_halflife, Range(0, 1e9, lo_open=True), noun=_SAMPLES,
                                    help="half-life of each metric's residual scale")
    false_alarm: float = setting(DetectorConfig.false_alarm, Range(0, 0.5, lo_open=True, hi_open=True),
                                 noun="a probability",
                                 help="target probability that a quiet metric's sample is flagged (sets lambda)")
    tol: float = setting(DetectorConfig.tol, Range(0, 0.1, lo_open=True),
                         help="solver tolerance: duality gap relative to ||P z||^2")
    max_iter: int = setting(DetectorConfig.max_iter, Range(1, 100_000), help="solver iteration cap per sample")
    min_samples: int = setting(DetectorConfig.min_samples, Range(2, 100_000),
                               help="samples a new metric needs before it enters the model")
    group_weight: float = setting(DetectorConfig.group_weight, Range(0, 100, lo_open=True),
                                  help="penalty of a group column relative to a single metric")
    log_metrics: list[str] = setting(list(MetricRules.log_patterns), allowed="a list of non-empty glob patterns",
                                     check=_patterns,
                                     help="metrics (by name pattern) modelled on a symmetric log scale")
    groups: dict[str, list[str]] = setting(
        {}, allowed="a table of group name -> non-empty list of glob patterns", check=_groups,
        help="group columns: metrics matching a group's patterns can shift as one coefficient")
    group_by: list[str] = setting(
        [], allowed="a list of label names", check=_patterns,
        help="group columns from labels: metrics sharing a value of one of these labels (written in the "
             "metric name as name{label=\"value\"}) can shift as one coefficient")


@dataclass(frozen=True)
class DecisionSection:
    """[decision]: confirmation, hysteresis and adaptation; the keys and defaults are ``DecisionConfig``'s."""

    confirm_k: int = setting(DecisionConfig.confirm_k, Range(1, 63), note=", at most confirm_m",
                             help="active samples needed among the last confirm_m to fire")
    confirm_m: int = setting(DecisionConfig.confirm_m, Range(1, 63), help="confirmation window")
    clear_sigma: float = setting(DecisionConfig.clear_sigma, Range(0, 100),
                                 help="a firing metric clears when its statistic stays below this many residual "
                                      "sigmas")
    clear_after: int = setting(DecisionConfig.clear_after, Range(1, 100_000),
                               help="consecutive quiet samples needed to clear")
    adapt_after: int = setting(DecisionConfig.adapt_after, Range(0, 10_000_000), note=" (0 = never)",
                               help="samples a shift may fire before it is accepted as the new normal")


@dataclass(frozen=True)
class EngineSection:
    """[engine]: batching and the per-process and per-entity bounds."""

    batch_size: int = setting(64, Range(1, 4096),
                              help="vectors per entity in one micro-batch (replay); live batches follow the polls")
    max_entities: int = setting(100_000, Range(1, 10_000_000),
                                help="entities one process tracks; vectors of further entities are rejected")
    max_delay_seconds: float = setting(
        0.2, Range(0, 60), noun=_SECONDS,
        help="while `shiftsieve run` is behind its input, the longest a vector waits for more of its entity's "
             "vectors to batch with (full batches of engine.batch_size run at once; once caught up, every poll "
             "runs at once)")
    max_resident: int = setting(
        0, Range(0, 10_000_000), note=" (0 = no limit)",
        help="models kept in memory by `shiftsieve run`: after each poll the least recently seen entities beyond "
             "it are evicted (snapshotted first with state.directory, and restored when they return; without it "
             "they warm up again)")
    max_metrics: int = setting(MetricRules.max_metrics, Range(1, 100_000),
                               help="metrics one entity tracks; further names are ignored and counted")
    drop_after: int = setting(MetricRules.drop_after, Range(1, 10_000_000),
                              help="samples a metric may be absent before it is dropped from its entity")


@dataclass(frozen=True)
class SourceSection:
    """[source]: where `shiftsieve run` reads, and how samples become vectors."""

    url: str = setting("-", allowed="kafka://HOST:PORT[,HOST:PORT]/TOPIC?group=NAME, a file path, or - (stdin)",
                       check=_source_url, help="where `shiftsieve run` reads vector messages")
    encoding: str = setting(ENCODINGS[0], ENCODINGS,
                            help="message encoding: the vector message, one sample per message, or OpenTelemetry "
                                 "OTLP/JSON")
    entity_labels: list[str] = setting(
        ["service", "instance"], allowed="a non-empty list of label names", check=_labels,
        help="labels whose values name the entity (sample and otlp_json, and replay of a Prometheus .json)")
    step_seconds: float = setting(30.0, Range(0, 86400, lo_open=True), noun=_SECONDS,
                                  help="samples are assembled into one vector per entity and step (sample and "
                                       "otlp_json)")
    allowed_lateness_seconds: float = setting(60.0, Range(0, 86400), noun=_SECONDS,
                                              help="how long a step stays open for late samples before its vector "
                                                   "is emitted; in replay inputs, how far behind its entity's "
                                                   "newest a vector may arrive and still be put back in order")
    poll_seconds: float = setting(0.5, Range(0, 60, lo_open=True), noun=_SECONDS,
                                  help="longest wait for input in one poll of the source (also bounds how long "
                                       "SIGTERM takes)")


@dataclass(frozen=True)
class KafkaSection:
    """[kafka]: client protocol, security and topics (the rules of ``KafkaSettings``, checked at load)."""

    api_version: str = setting("auto", allowed="auto or a version such as 2.5.0", check=_api_version,
                               help="Kafka protocol version the client speaks (auto = negotiate)")
    security_protocol: str = setting(SECURITY_PROTOCOLS[0], SECURITY_PROTOCOLS, help="Kafka security protocol")
    sasl_mechanism: str = setting("", ("", *SASL_MECHANISMS), allowed="empty, " + _either(SASL_MECHANISMS),
                                  help="SASL mechanism")
    sasl_username: str = setting("", help="SASL user name")
    sasl_password: str = setting("", secret=True,
                                 help="SASL password (prefer sasl_password_file or the environment; never printed)")
    sasl_password_file: str = setting("", allowed="a file path or empty",
                                      help="file holding the SASL password (e.g. a mounted secret)")
    ssl_cafile: str = setting("", allowed="a file path or empty", help="CA bundle for TLS")
    ssl_certfile: str = setting("", allowed="a file path or empty", help="client certificate for TLS")
    ssl_keyfile: str = setting("", allowed="a file path or empty", help="client key for TLS")
    session_timeout_ms: int = setting(10_000, Range(1000, 300_000),
                                      help="consumer-group session timeout: how fast a dead member's partitions "
                                           "move")
    fetch_partition_bytes: int = setting(
        8 << 20, Range(1 << 16, 1 << 28),
        help="most bytes one fetch returns per partition (at least one message is always returned): bigger "
             "fetches mean fewer round trips when behind, at that much memory per assigned partition")
    alert_topic: str = setting("", allowed=_TOPIC, check=_kafka_topic_or_empty,
                               help="topic for alert events (empty = none)")
    dead_letter_topic: str = setting("", allowed=_TOPIC, check=_kafka_topic_or_empty,
                                     help="topic for rejected messages with a reason header (empty = the "
                                          "--dead-letter file only)")


@dataclass(frozen=True)
class StateSection:
    """[state]: per-entity model snapshots."""

    directory: str = setting("", allowed="a directory path or empty",
                             help="where per-entity model snapshots are kept (empty = no snapshots)")
    snapshot_seconds: float = setting(30.0, Range(0, 86400, lo_open=True), noun=_SECONDS,
                                      help="how often snapshots are written (offsets are committed after)")


@dataclass(frozen=True)
class HttpSection:
    """[http]: the metrics and health endpoints."""

    listen: str = setting("127.0.0.1:9471", allowed="HOST:PORT with a port in 0..65535", check=_listen,
                          help="address of /metrics, /healthz and /readyz (loopback by default: expose it on "
                               "purpose)")
    max_series: int = setting(10_000, Range(10, 10_000_000),
                              help="cap on exported per-entity and per-shift series; the rest are counted as "
                                   "withheld")


@dataclass(frozen=True)
class InputSection:
    """[input]: size bounds on what one message or replay file may cost."""

    max_message_bytes: int = setting(DecodeLimits.max_bytes, Range(64, 1 << 26),
                                     help="largest accepted message or line")
    max_file_bytes: int = setting(
        DEFAULT_MAX_FILE_BYTES, Range(1024, 1 << 32),
        help="largest whole-document replay input (a Prometheus range-query .json, decompressed size), read into "
             "memory at once (parsed, it takes several times this)")
    max_metrics_per_message: int = setting(DecodeLimits.max_metrics, Range(1, 1_000_000),
                                           help="most metrics accepted in one vector")


@dataclass(frozen=True, init=False, eq=False)
class Config:
    """Validated settings, one typed section per [table]: ``config.model.warmup``.

    Built from flat ``values`` and ``sources`` keyed by (section, key); ``sources`` says where
    each value came from (``default``, the file, a variable), as `config check` shows it.
    """

    model: ModelSection
    decision: DecisionSection
    engine: EngineSection
    source: SourceSection
    kafka: KafkaSection
    state: StateSection
    http: HttpSection
    input: InputSection
    sources: dict[tuple[str, str], str] = field(repr=False)

    def __init__(self, values: Mapping[tuple[str, str], Any], sources: Mapping[tuple[str, str], str]) -> None:
        for name, section in SECTIONS.items():
            object.__setattr__(self, name, section(**{f.name: values[(name, f.name)] for f in fields(section)}))
        object.__setattr__(self, "sources", dict(sources))

    def get(self, section: str, key: str) -> Any:
        return getattr(getattr(self, section), key)

    def items(self) -> list[tuple[Setting, Any, str]]:
        """Every setting with its value and source, in schema order."""
        return [(s, self.get(s.section, s.key), self.sources[(s.section, s.key)]) for s in SCHEMA]

    def detector_config(self) -> DetectorConfig:
        """The model's configuration: [model] keys by their ``DetectorConfig`` names, [decision] as ``DecisionConfig``."""
        model = {f.name: getattr(self.model, f.name) for f in fields(DetectorConfig) if f.name != "decision"}
        return DetectorConfig(**{**model, "rank": self.model.rank or None},
                              decision=DecisionConfig(**asdict(self.decision)))

    def metric_rules(self) -> MetricRules:
        """Name-based metric settings ([model] log scale and groups, [engine] metric bounds)."""
        m, e = self.model, self.engine
        return MetricRules(log_patterns=tuple(m.log_metrics),
                           groups=tuple((k, tuple(v)) for k, v in m.groups.items()), group_by=tuple(m.group_by),
                           max_metrics=e.max_metrics, drop_after=e.drop_after)

    def decode_limits(self) -> DecodeLimits:
        """Per-message bounds of the decoders ([input])."""
        return DecodeLimits(max_bytes=self.input.max_message_bytes, max_metrics=self.input.max_metrics_per_message)

    def kafka_settings(self, url: str) -> KafkaSettings:
        """Kafka client settings for a ``kafka://`` URL and [kafka]; a password file is read again
        here, when the client is about to connect (it may have been rotated since loading)."""
        bootstrap, topic, group = parse_kafka_url(url)
        k = self.kafka
        password = k.sasl_password
        if k.sasl_password_file:
            try:
                password = Path(k.sasl_password_file).read_text().strip()
            except OSError as exc:
                raise ConfigError(f"kafka.sasl_password_file: cannot read {k.sasl_password_file}: "
                                  f"{exc.strerror}") from None
        version = None if k.api_version == "auto" else tuple(int(p) for p in k.api_version.split("."))
        return KafkaSettings(bootstrap=bootstrap, topic=topic, group=group, api_version=version,
                             security_protocol=k.security_protocol, sasl_mechanism=k.sasl_mechanism or None,
                             sasl_username=k.sasl_username or None, sasl_password=password or None,
                             ssl_cafile=k.ssl_cafile or None, ssl_certfile=k.ssl_certfile or None,
                             ssl_keyfile=k.ssl_keyfile or None, session_timeout_ms=k.session_timeout_ms,
                             max_message_bytes=self.input.max_message_bytes,
                             fetch_partition_bytes=k.fetch_partition_bytes)


SECTIONS = section_types(Config)
SCHEMA: tuple[Setting, ...] = derive_schema(Config)
_BY_NAME = {(s.section, s.key): s for s in SCHEMA}
_ENV_NAMES = frozenset(s.env for s in SCHEMA)


def load_config(path: str | os.PathLike | None = None, environ: Mapping[str, str] | None = None) -> Config:
    """Defaults, then the TOML file (if any), then ``SHIFTSIEVE_<SECTION>_<KEY>`` variables."""
    environ = os.environ if environ is None else environ
    values = {(s.section, s.key): copy.deepcopy(s.default) for s in SCHEMA}
    sources = {(s.section, s.key): "default" for s in SCHEMA}
    if path is not None:
        _read_file(Path(path), values, sources)
    for setting in SCHEMA:
        if setting.env in environ:
            values[(setting.section, setting.key)] = coerce(setting, parse_env(setting, environ[setting.env]),
                                                            setting.env)
            sources[(setting.section, setting.key)] = setting.env
    unknown = sorted(k for k in environ if k.startswith(ENV_PREFIX) and k not in _ENV_NAMES
                     and k not in NOT_CONFIG_ENV)
    if unknown:
        moved = next((f"; it is {ENV_PREFIX}{new.replace('.', '_').upper()} now" for (section, key), new in MOVED.items()
                      if unknown[0] == f"{ENV_PREFIX}{section.upper()}_{key.upper()}"), "")
        raise ConfigError(f"unknown environment variable {unknown[0]}{moved} (see `shiftsieve config check`)")
    if values[("decision", "confirm_k")] > values[("decision", "confirm_m")]:
        raise ConfigError(f"decision.confirm_k: expected at most decision.confirm_m "
                          f"({values[('decision', 'confirm_m')]}), got {values[('decision', 'confirm_k')]}")
    _check_kafka(values, sources)
    return Config(values, sources)


def _read_file(path: Path, values: dict[tuple[str, str], Any], sources: dict[tuple[str, str], str]) -> None:
    """The TOML file's values over ``values``: every key known, every value checked."""
    for section, table in _read_toml(path).items():
        if not isinstance(table, dict):
            raise ConfigError(f"{path}: top-level key {section!r} must be a [section] table")
        if section not in SECTIONS:   # also an empty [typo] table
            raise ConfigError(f"{path}: unknown section [{section}] (known sections: {', '.join(sorted(SECTIONS))})")
        for key, value in table.items():
            setting = _BY_NAME.get((section, key))
            if setting is None:
                known = sorted(f.name for f in fields(SECTIONS[section]))
                moved = f"; it is {MOVED[(section, key)]} now" if (section, key) in MOVED else ""
                raise ConfigError(f"{path}: unknown key {section}.{key}{moved} (known keys: {', '.join(known)})")
            values[(section, key)] = coerce(setting, value, str(path))
            sources[(section, key)] = str(path)


def _check_kafka(values: dict[tuple[str, str], Any], sources: dict[tuple[str, str], str]) -> None:
    """The [kafka] files and cross-field rules, checked here so `config check` reports them.

    The rules are the ones `KafkaSettings` enforces (stream/kafka/settings.py) when `shiftsieve run` builds
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
                password = content.decode("utf-8").strip()
            except UnicodeDecodeError:
                raise ConfigError(f"{where(key)}: {name} is not UTF-8 text") from None
            if not password:
                raise ConfigError(f"{where(key)}: {name} is empty: expected the SASL password")
            values[("kafka", "sasl_password")] = password
            sources[("kafka", "sasl_password")] = f"kafka.sasl_password_file ({sources[('kafka', key)]})"
    protocol, mechanism = values[("kafka", "security_protocol")], values[("kafka", "sasl_mechanism")]
    if protocol.startswith("SASL_"):
        if not mechanism:
            raise ConfigError(f"{where('sasl_mechanism')}: expected {_either(SASL_MECHANISMS)} "
                              f"with kafka.security_protocol {protocol}, got ''")
        if not values[("kafka", "sasl_username")]:
            raise ConfigError(f"{where('sasl_username')}: expected a user name with kafka.security_protocol "
                              f"{protocol}, got ''")
        if not values[("kafka", "sasl_password")]:
            raise ConfigError(f"kafka.sasl_password: expected a password with kafka.security_protocol {protocol} "
                              f"(kafka.sasl_password, kafka.sasl_password_file or "
                              f"{_BY_NAME[('kafka', 'sasl_password')].env})")
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
        shown = "\"***\"" if setting.secret and value else toml_value(value)
        lines.append(f"{setting.key} = {shown}  # {source}; {setting.help}")
    return "\n".join(lines) + "\n"

"""Configuration: TOML file, environment overrides, one-line errors, `config check`."""

import pytest

from shiftsieve.stream.cli import main
from shiftsieve.stream.config import SCHEMA, ConfigError, load_config


def test_defaults_and_file_and_env(tmp_path):
    path = tmp_path / "c.toml"
    path.write_text('[model]\nwarmup = 120\nlog_metrics = ["lat_*"]\n[model.groups]\ndb = ["db_*"]\n')
    cfg = load_config(path, environ={"SHIFTSIEVE_DECISION_CONFIRM_K": "2", "SHIFTSIEVE_MODEL_FALSE_ALARM": "0.01"})
    assert cfg.model.warmup == 120
    assert cfg.model.log_metrics == ["lat_*"]
    assert cfg.model.groups == {"db": ["db_*"]}
    assert cfg.decision.confirm_k == 2
    assert cfg.model.false_alarm == 0.01
    assert cfg.sources[("decision", "confirm_k")] == "SHIFTSIEVE_DECISION_CONFIRM_K"
    det = cfg.detector_config()
    assert det.warmup == 120 and det.decision.confirm_k == 2 and det.rank is None


@pytest.mark.parametrize("text,key", [
    ("[model]\nwarmup = 3\n", "model.warmup"),
    ("[model]\nfalse_alarm = 0.7\n", "model.false_alarm"),
    ("[model]\nfalse_alarm = \"low\"\n", "model.false_alarm"),
    ("[decision]\nconfirm_k = 9\nconfirm_m = 5\n", "decision.confirm_k"),
    ("[model]\nwarmpu = 100\n", "model.warmpu"),
    ("[model]\ngroups = {db = []}\n", "model.groups"),
    ("[engine]\nbatch_size = true\n", "engine.batch_size"),
    ("model = 3\n", "model"),
    ("[model\n", "invalid TOML"),
])
def test_invalid_values_give_one_line_errors_naming_the_key(tmp_path, text, key):
    path = tmp_path / "bad.toml"
    path.write_text(text)
    with pytest.raises(ConfigError) as err:
        load_config(path, environ={})
    message = str(err.value)
    assert key in message and "\n" not in message


def test_invalid_env_value_and_unknown_env_variable():
    with pytest.raises(ConfigError, match="SHIFTSIEVE_MODEL_WARMUP"):
        load_config(environ={"SHIFTSIEVE_MODEL_WARMUP": "many"})
    with pytest.raises(ConfigError, match="SHIFTSIEVE_MODEL_WARMPU"):
        load_config(environ={"SHIFTSIEVE_MODEL_WARMPU": "100"})


def test_every_setting_default_passes_its_own_check():
    for s in SCHEMA:
        assert s.check(s.default), s.key


def test_config_check_command(tmp_path, capsys):
    good = tmp_path / "good.toml"
    good.write_text("[model]\nwarmup = 150\n")
    assert main(["config", "check", str(good)]) == 0
    out = capsys.readouterr().out
    assert "warmup = 150  # " + str(good) in out
    bad = tmp_path / "bad.toml"
    bad.write_text("[model]\nwarmup = -1\n")
    assert main(["config", "check", str(bad)]) == 2
    err = capsys.readouterr().err
    assert err.startswith("shiftsieve: error: model.warmup") and err.count("\n") == 1
    assert main(["config", "check", str(tmp_path / "missing.toml")]) == 2


def test_config_check_masks_secrets(capsys):
    import os
    os.environ["SHIFTSIEVE_KAFKA_SASL_PASSWORD"] = "hunter2-not-for-logs"
    try:
        assert main(["config", "check"]) == 0
    finally:
        del os.environ["SHIFTSIEVE_KAFKA_SASL_PASSWORD"]
    out = capsys.readouterr().out
    assert "hunter2-not-for-logs" not in out and 'sasl_password = "***"' in out


def test_choice_settings_are_validated(tmp_path):
    path = tmp_path / "c.toml"
    path.write_text('[source]\nencoding = "protobuf"\n')
    with pytest.raises(ConfigError, match="source.encoding"):
        load_config(path, environ={})
    path.write_text('[kafka]\napi_version = "two"\n')
    with pytest.raises(ConfigError, match="kafka.api_version"):
        load_config(path, environ={})


# -- every setting: invalid values give one line naming the key and the allowed range ---------------
import math  # noqa: E402
import re  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402

from shiftsieve.stream.config import ENV_PREFIX  # noqa: E402

NUMERIC = [s for s in SCHEMA if s.kind in (int, float)]
_INT_RANGE = re.compile(r"(-?\d+)\.\.(-?\d+)")
_INTERVAL = re.compile(r"([\[(])\s*(-?[0-9.e+]+),\s*(-?[0-9.e+]+)\s*([\])])")

#: wrong-typed TOML values per kind (the type check precedes the range check)
WRONG_TYPE = {
    int: ['"ten"', "2.5", "true", "[1]", "{a = 1}"],
    float: ['"half"', "true", "[0.5]", "{a = 1.0}"],
    str: ["5", "1.5", "true", '["x"]', "{a = 1}"],
    list: ['"x"', "5", "true", "[1, 2]", '[""]', "{a = 1}"],
    dict: ['"x"', "5", '["x"]', '{a = "b"}', "{a = []}", "{a = [1]}"],
}
#: string settings that constrain their value, with values they must refuse (the test below
#: keeps this complete: a string setting not listed here must accept any string)
INVALID_STRINGS = {
    ("source", "url"): ["", "   ", "kafka://host-without-port/topic?group=g", "kafka://h:9092/t",
                        "kafka://h:9092/bad topic?group=g", "kafka://user:pw@h:9092/t?group=g"],
    ("source", "encoding"): ["protobuf", "VECTOR", ""],
    ("kafka", "api_version"): ["2.5", "latest", "2.5.x", ""],
    ("kafka", "security_protocol"): ["TLS", "sasl_ssl", ""],
    ("kafka", "sasl_mechanism"): ["GSSAPI", "OAUTHBEARER", "plain"],
    ("kafka", "alert_topic"): ["bad topic", "..", "a/b", "x" * 250],
    ("kafka", "dead_letter_topic"): ["bad topic", ".", "é"],
    ("http", "listen"): ["nohost", "h:99999", "h:", "h:-1", ""],
}
#: strings an unconstrained string setting accepts
ANY_STRINGS = ["", "x", "12345", "true", "a b c", "/some/path", "kafka://h:9092/t?group=g", "é"]


@pytest.fixture
def no_shiftsieve_env(monkeypatch):
    """Tests that go through os.environ (the CLI) start without any SHIFTSIEVE_ configuration."""
    for name in list(__import__("os").environ):
        if name.startswith(ENV_PREFIX):
            monkeypatch.delenv(name)
    return monkeypatch


def _bounds(s):
    """(lo, hi, lo_open, hi_open) as the allowed text states them."""
    if s.kind is int:
        m = _INT_RANGE.search(s.allowed)
        assert m, f"{s.section}.{s.key}: allowed text {s.allowed!r} states no range lo..hi"
        return int(m.group(1)), int(m.group(2)), False, False
    m = _INTERVAL.search(s.allowed)
    assert m, f"{s.section}.{s.key}: allowed text {s.allowed!r} states no interval"
    return float(m.group(2)), float(m.group(3)), m.group(1) == "(", m.group(4) == ")"


def _toml(value):
    if isinstance(value, float):
        if math.isnan(value):
            return "nan"
        return repr(value) if math.isfinite(value) else ("inf" if value > 0 else "-inf")
    return str(value)


def _out_of_range(s):
    """TOML texts just outside the stated range (and far outside), for a numeric setting."""
    lo, hi, lo_open, hi_open = _bounds(s)
    if s.kind is int:
        return [str(lo - 1), str(hi + 1), str(-10 ** 30), str(10 ** 30), "1" + "0" * 400]
    below = lo if lo_open else math.nextafter(lo, -math.inf)
    above = hi if hi_open else math.nextafter(hi, math.inf)
    return [_toml(below), _toml(above), "nan", "inf", "-inf", "-1e300", "1e300", "1" + "0" * 400]


def _in_range(s):
    lo, hi, lo_open, hi_open = _bounds(s)
    if s.kind is int:
        return [lo, hi, (lo + hi) // 2]
    return [math.nextafter(lo, math.inf) if lo_open else lo, math.nextafter(hi, -math.inf) if hi_open else hi,
            (lo + hi) / 2]


def _invalid(s):
    """Every invalid TOML value text for a setting."""
    texts = list(WRONG_TYPE[s.kind])
    if s.kind in (int, float):
        texts += _out_of_range(s)
    texts += ['"' + v.replace("\\", "\\\\").replace('"', '\\"') + '"'
              for v in INVALID_STRINGS.get((s.section, s.key), [])]
    return texts


def _companions(s, value):
    """Other settings a value needs to pass the cross-field rules (confirm_k <= confirm_m)."""
    if (s.section, s.key) == ("decision", "confirm_k"):
        return {("decision", "confirm_m"): 63}
    if (s.section, s.key) == ("decision", "confirm_m"):
        return {("decision", "confirm_k"): 1}
    return {}


def _check(capsys, argv):
    rc = main(argv)
    captured = capsys.readouterr()
    return rc, captured.out, captured.err


def _assert_one_line_error(rc, out, err, *must_contain):
    assert rc == 2, (rc, out, err)
    assert out == "", out
    assert err.startswith("shiftsieve: error: ") and err.endswith("\n") and err.count("\n") == 1, err
    assert "Traceback" not in err
    for text in must_contain:
        assert text in err, (text, err)


def _ids(settings):
    return [f"{s.section}.{s.key}" for s in settings]


def test_every_numeric_setting_states_its_range_and_its_check_agrees():
    for s in NUMERIC:
        lo, hi, lo_open, hi_open = _bounds(s)
        assert s.check(s.kind(lo)) is not lo_open and s.check(s.kind(hi)) is not hi_open, s.key
        for v in _in_range(s):
            assert s.check(v), (s.key, v)


def test_the_invalid_string_table_is_complete():
    for s in SCHEMA:
        if s.kind is not str:
            continue
        if (s.section, s.key) in INVALID_STRINGS:
            for v in INVALID_STRINGS[(s.section, s.key)]:
                assert not s.check(v), (s.key, v)
        else:   # unconstrained: the allowed text must not promise a check that does not exist
            assert all(s.check(v) for v in ANY_STRINGS), \
                f"{s.section}.{s.key} constrains its value: add invalid examples to INVALID_STRINGS"


@pytest.mark.parametrize("s", SCHEMA, ids=_ids(SCHEMA))
def test_config_check_rejects_every_invalid_value_in_the_file(s, tmp_path, capsys, no_shiftsieve_env):
    path = tmp_path / "bad.toml"
    for text in _invalid(s):
        path.write_text(f"[{s.section}]\n{s.key} = {text}\n")
        rc, out, err = _check(capsys, ["config", "check", str(path)])
        _assert_one_line_error(rc, out, err, f"{s.section}.{s.key}", s.allowed)
        assert len(err) < 400, err   # one short line, even for a 400-digit value


@pytest.mark.parametrize("s", SCHEMA, ids=_ids(SCHEMA))
def test_config_check_rejects_every_invalid_value_in_the_environment(s, capsys, no_shiftsieve_env):
    texts = _invalid(s)
    if s.kind is str:   # from the environment a string setting takes any text: only the checks can refuse
        texts = INVALID_STRINGS.get((s.section, s.key), [])
    elif s.kind in (int, float):
        texts = [*texts, "ten", ""]   # not TOML at all
    for text in texts:
        no_shiftsieve_env.setenv(s.env, text)
        rc, out, err = _check(capsys, ["config", "check"])
        _assert_one_line_error(rc, out, err, f"{s.section}.{s.key}", s.env, s.allowed)
        assert len(err) < 400, err


@pytest.mark.parametrize("s", NUMERIC, ids=_ids(NUMERIC))
def test_values_at_the_stated_bounds_are_accepted_and_build_a_detector(s, tmp_path, no_shiftsieve_env):
    for value in _in_range(s):
        lines = {s.section: [f"{s.key} = {_toml(value)}"]}
        for (section, key), v in _companions(s, value).items():
            lines.setdefault(section, []).append(f"{key} = {v}")
        path = tmp_path / "ok.toml"
        path.write_text("".join(f"[{sec}]\n" + "\n".join(ls) + "\n" for sec, ls in lines.items()))
        cfg = load_config(path, environ={})
        assert cfg.get(s.section, s.key) == value
        cfg.detector_config()   # the models accept every value the configuration does
        env = {s.env: _toml(value), **{f"{ENV_PREFIX}{sec.upper()}_{key.upper()}": str(v)
                                      for (sec, key), v in _companions(s, value).items()}}
        assert load_config(environ=env).get(s.section, s.key) == value


def test_string_settings_from_the_environment_keep_digits_and_words():
    cfg = load_config(environ={"SHIFTSIEVE_KAFKA_SASL_USERNAME": "12345", "SHIFTSIEVE_STATE_DIRECTORY": "true",
                               "SHIFTSIEVE_KAFKA_ALERT_TOPIC": '"alerts"', "SHIFTSIEVE_KAFKA_SASL_PASSWORD": '"007"'})
    assert cfg.kafka.sasl_username == "12345" and cfg.state.directory == "true"
    assert cfg.kafka.alert_topic == "alerts"          # a TOML string literal is unquoted
    assert cfg.kafka.sasl_password == '"007"'         # a secret is taken verbatim


def test_a_mistyped_secret_is_not_echoed(tmp_path, capsys, no_shiftsieve_env):
    path = tmp_path / "bad.toml"
    path.write_text("[kafka]\nsasl_password = 31415926\n")
    rc, out, err = _check(capsys, ["config", "check", str(path)])
    _assert_one_line_error(rc, out, err, "kafka.sasl_password")
    assert "31415926" not in err and "***" in err


@pytest.mark.parametrize("text,named", [
    ("[model]\nwarmpu = 100\n", "model.warmpu"),
    ("[modle]\nwarmup = 100\n", "modle"),
    ("[modle]\n", "modle"),                              # an empty unknown section too
    ("[model.groupz]\na = [\"x\"]\n", "model.groupz"),
    ("warmup = 100\n", "warmup"),
    ("[model]\nwarmup = 100\nwarmup = 200\n", "invalid TOML"),
])
def test_unknown_keys_and_sections_give_one_line_errors(text, named, tmp_path, capsys, no_shiftsieve_env):
    path = tmp_path / "bad.toml"
    path.write_text(text)
    _assert_one_line_error(*_check(capsys, ["config", "check", str(path)]), named)


@pytest.mark.parametrize("name", ["SHIFTSIEVE_MODEL_WARMPU", "SHIFTSIEVE_MODLE_WARMUP", "SHIFTSIEVE_WARMUP"])
def test_unknown_environment_variables_give_one_line_errors(name, capsys, no_shiftsieve_env):
    no_shiftsieve_env.setenv(name, "100")
    _assert_one_line_error(*_check(capsys, ["config", "check"]), name)


def test_harness_variables_are_not_configuration(capsys, no_shiftsieve_env):
    # CI exports SHIFTSIEVE_REQUIRE_BROKER=1 (.ci/run); tests/conftest.py reads SHIFTSIEVE_TANSU_BIN
    no_shiftsieve_env.setenv("SHIFTSIEVE_REQUIRE_BROKER", "1")
    no_shiftsieve_env.setenv("SHIFTSIEVE_TANSU_BIN", "/nowhere/tansu")
    assert _check(capsys, ["config", "check"])[0] == 0


@pytest.mark.parametrize("text,env,named", [
    ("[decision]\nconfirm_k = 6\nconfirm_m = 5\n", {}, "decision.confirm_k"),
    ("[decision]\nconfirm_m = 2\n", {"SHIFTSIEVE_DECISION_CONFIRM_K": "3"}, "decision.confirm_k"),
    ("", {"SHIFTSIEVE_DECISION_CONFIRM_K": "9", "SHIFTSIEVE_DECISION_CONFIRM_M": "8"}, "decision.confirm_k"),
    ('[kafka]\nsecurity_protocol = "SASL_SSL"\n', {}, "kafka.sasl_mechanism"),
    ('[kafka]\nsecurity_protocol = "SASL_PLAINTEXT"\nsasl_mechanism = "PLAIN"\n', {}, "kafka.sasl_username"),
    ('[kafka]\nsecurity_protocol = "SASL_SSL"\nsasl_mechanism = "SCRAM-SHA-256"\nsasl_username = "u"\n', {},
     "kafka.sasl_password"),
    ('[kafka]\nsasl_mechanism = "PLAIN"\n', {}, "kafka.sasl_mechanism"),
    ('[kafka]\nsecurity_protocol = "SSL"\n', {"SHIFTSIEVE_KAFKA_SASL_MECHANISM": "SCRAM-SHA-512"},
     "kafka.sasl_mechanism"),
])
def test_cross_field_rules(text, env, named, tmp_path, capsys, no_shiftsieve_env):
    path = tmp_path / "bad.toml"
    path.write_text(text)
    for k, v in env.items():
        no_shiftsieve_env.setenv(k, v)
    _assert_one_line_error(*_check(capsys, ["config", "check", str(path)]), named)


def test_cross_field_rules_accept_the_limits(tmp_path):
    path = tmp_path / "ok.toml"
    path.write_text("[decision]\nconfirm_k = 5\nconfirm_m = 5\n")
    assert load_config(path, environ={}).detector_config().decision.confirm_k == 5


@pytest.mark.parametrize("key", ["ssl_cafile", "ssl_certfile", "ssl_keyfile", "sasl_password_file"])
def test_missing_kafka_files_are_named(key, tmp_path, capsys, no_shiftsieve_env):
    path = tmp_path / "bad.toml"
    missing = tmp_path / "nope.pem"
    path.write_text(f'[kafka]\n{key} = "{missing}"\n')
    _assert_one_line_error(*_check(capsys, ["config", "check", str(path)]), f"kafka.{key}", str(missing))
    no_shiftsieve_env.setenv(f"SHIFTSIEVE_KAFKA_{key.upper()}", str(tmp_path))   # a directory
    _assert_one_line_error(*_check(capsys, ["config", "check"]), f"kafka.{key}", f"SHIFTSIEVE_KAFKA_{key.upper()}")


def test_the_installed_command_exits_2_with_one_line(tmp_path):
    path = tmp_path / "bad.toml"
    path.write_text("[model]\nenergy = 1.5\n")
    env = {k: v for k, v in __import__("os").environ.items() if not k.startswith(ENV_PREFIX)}
    done = subprocess.run([sys.executable, "-m", "shiftsieve.stream.cli", "config", "check", str(path)],
                          capture_output=True, text=True, env=env, timeout=60)
    assert done.returncode == 2 and done.stdout == ""
    assert done.stderr == "shiftsieve: error: model.energy (%s): expected a number in (0, 1], got 1.5\n" % path


# -- one declaration: the schema is the section dataclasses; the library's defaults are the CLI's ----------
from dataclasses import fields  # noqa: E402

from shiftsieve.models.decision import DecisionConfig  # noqa: E402
from shiftsieve.models.detector import DetectorConfig  # noqa: E402
from shiftsieve.models.normaliser import decay_for_halflife  # noqa: E402
from shiftsieve.models.subspace import SubspaceTracker  # noqa: E402
from shiftsieve.stream.assemble import MetricRules  # noqa: E402
from shiftsieve.stream.config import SECTIONS  # noqa: E402


def test_the_schema_is_derived_from_the_section_dataclasses():
    assert [(s.section, s.key) for s in SCHEMA] == [(name, f.name) for name, section in SECTIONS.items()
                                                    for f in fields(section)]
    assert len({s.env for s in SCHEMA}) == len(SCHEMA)
    cfg = load_config(environ={})
    for s in SCHEMA:
        assert isinstance(getattr(cfg, s.section), SECTIONS[s.section])
        assert cfg.get(s.section, s.key) == s.default == getattr(SECTIONS[s.section](), s.key), s.key
    cfg.model.log_metrics.append("mutated_*")   # a loaded value is the caller's, not the schema's default
    assert "mutated_*" not in load_config(environ={}).model.log_metrics


def test_every_model_setting_is_a_config_key_with_the_library_default():
    assert {f.name for f in fields(DetectorConfig)} - {"decision"} <= {f.name for f in fields(SECTIONS["model"])}
    assert [f.name for f in fields(DecisionConfig)] == [f.name for f in fields(SECTIONS["decision"])]
    assert load_config(environ={}).detector_config() == DetectorConfig()
    assert DecisionConfig().adapt_after == 1440   # the CLI's default since it had one (the library's was 0)
    tracker, model = SubspaceTracker(), DetectorConfig()
    assert (tracker.energy, tracker.max_rank, tracker.decay) == \
        (model.energy, model.max_rank, decay_for_halflife(model.baseline_halflife))


def test_config_builds_the_metric_rules_decode_limits_and_kafka_settings(tmp_path):
    secret = tmp_path / "password"
    secret.write_text("s3cret\n")
    path = tmp_path / "c.toml"
    path.write_text('[model]\nlog_metrics = ["lat_*"]\ngroup_by = ["dep"]\n[model.groups]\ndb = ["db_*"]\n'
                    "[engine]\nmax_metrics = 50\ndrop_after = 7\n"
                    "[input]\nmax_message_bytes = 4096\nmax_metrics_per_message = 99\n"
                    '[kafka]\napi_version = "2.5.0"\nsecurity_protocol = "SASL_SSL"\nsasl_mechanism = "PLAIN"\n'
                    f'sasl_username = "u"\nsasl_password_file = "{secret}"\nfetch_partition_bytes = 65536\n')
    cfg = load_config(path, environ={})
    assert cfg.metric_rules() == MetricRules(log_patterns=("lat_*",), groups=(("db", ("db_*",)),), group_by=("dep",),
                                             max_metrics=50, drop_after=7)
    limits = cfg.decode_limits()
    assert (limits.max_bytes, limits.max_metrics) == (4096, 99)
    kafka = cfg.kafka_settings("kafka://h1:9092,h2:9093/metrics?group=g")
    assert kafka.bootstrap == ("h1:9092", "h2:9093") and (kafka.topic, kafka.group) == ("metrics", "g")
    assert kafka.api_version == (2, 5, 0) and (kafka.sasl_mechanism, kafka.sasl_username) == ("PLAIN", "u")
    assert kafka.sasl_password == "s3cret" and kafka.max_message_bytes == 4096 and kafka.fetch_partition_bytes == 65536
    default = load_config(environ={}).kafka_settings("kafka://h:9092/t?group=g")
    assert default.api_version is None and default.sasl_mechanism is None and default.sasl_password is None


def test_the_secret_is_not_in_the_repr_of_a_config():
    cfg = load_config(environ={"SHIFTSIEVE_KAFKA_SASL_PASSWORD": "hunter2-not-for-logs"})
    assert cfg.kafka.sasl_password == "hunter2-not-for-logs"
    assert "hunter2" not in repr(cfg) and "hunter2" not in repr(cfg.kafka)


def test_a_moved_key_says_where_it_went(tmp_path):
    path = tmp_path / "old.toml"
    path.write_text("[http]\npoll_seconds = 0.2\n")
    with pytest.raises(ConfigError, match=r"unknown key http\.poll_seconds; it is source\.poll_seconds now"):
        load_config(path, environ={})
    with pytest.raises(ConfigError, match="SHIFTSIEVE_HTTP_POLL_SECONDS; it is SHIFTSIEVE_SOURCE_POLL_SECONDS now"):
        load_config(None, environ={"SHIFTSIEVE_HTTP_POLL_SECONDS": "0.2"})

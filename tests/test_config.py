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

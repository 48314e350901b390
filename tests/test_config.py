"""Config validation, rule resolution, and check-config."""

from __future__ import annotations

import pytest

from service.cli import main
from service.config import load_config, parse_config
from service.errors import ConfigError


def test_defaults_apply_when_no_rule_matches():
    cfg = parse_config("")
    s = cfg.settings_for("anything")
    assert (s.window, s.lateness, s.model.kind, s.model.threshold, s.model.warm_up) == (60.0, 10.0, "combined", 0.99, 36)
    assert s.rule_index is None


def test_first_matching_rule_wins_and_overrides_only_what_it_sets():
    cfg = parse_config(
        """
[defaults]
window = "2m"
[defaults.params]
trees = 12
[[rules]]
match = "ticket-*"
threshold = 0.995
[rules.params]
height = 6
[[rules]]
match = "ticket-api"
window = "10s"
"""
    )
    s = cfg.settings_for("ticket-api")
    assert s.rule_index == 0 and s.window == 120.0 and s.model.threshold == 0.995
    assert (s.model.trees, s.model.height) == (12, 6)
    assert cfg.settings_for("ticket-api-2").rule_index == 0
    assert cfg.settings_for("berth").rule_index is None


@pytest.mark.parametrize("text,seconds", [("250ms", 0.25), ("30s", 30.0), ("5m", 300.0), ("1h", 3600.0), ("2d", 172800.0), ("45", 45.0)])
def test_durations(text, seconds):
    value = f'"{text}"' if not text.isdigit() else text
    assert parse_config(f"[defaults]\nwindow = {value}").defaults.window == seconds


def test_unknown_keys_are_rejected_with_their_path():
    with pytest.raises(ConfigError) as info:
        parse_config('[[rules]]\nmatch = "a"\nwindoww = "1m"\n', "x.toml")
    assert info.value.problems == ["x.toml: rules.0.windoww: unknown key (value '1m'); remove it or check its spelling"]


def test_bad_values_name_the_file_field_value_and_what_is_allowed():
    with pytest.raises(ConfigError) as info:
        parse_config('[defaults]\nwindow = "5 minutes"\nthreshold = 1.5\nmodel = "forest"\n', "f.toml")
    assert info.value.problems == [
        "f.toml: defaults.window: Value error, '5 minutes' is not a duration; write a number and a unit, "
        "e.g. '30s', '5m', '1h', '250ms', '2d' (got '5 minutes')",
        "f.toml: defaults.model: Input should be 'half_space_trees', 'adaptive_baseline' or 'combined' (got 'forest')",
        "f.toml: defaults.threshold: Input should be less than or equal to 1 (got 1.5)",
    ]


def test_feature_syntax_is_checked():
    with pytest.raises(ConfigError) as info:
        parse_config('[defaults]\nfeatures = ["lat:median"]\n')
    assert "aggregate 'median' is not one of" in str(info.value)


def test_not_toml_is_a_config_error():
    with pytest.raises(ConfigError, match="not valid TOML"):
        parse_config("[defaults\n")


def test_the_shipped_example_is_valid(repo_root):
    cfg = load_config(repo_root / "config" / "tidewatch.example.toml")
    assert cfg.settings_for("ticket-api").window == 300.0


def test_check_config_prints_the_rule_each_service_gets(repo_root, capsys):
    code = main(["check-config", str(repo_root / "config" / "tidewatch.example.toml"), "ticket-api", "nightly"])
    out = capsys.readouterr().out.splitlines()
    assert code == 0
    assert out[1].startswith("ticket-api: rule #1 (match 'ticket-*'): window 5m")
    assert out[2].startswith("nightly: defaults: window 1m")


def test_check_config_exits_2_on_a_bad_file(tmp_path, capsys):
    p = tmp_path / "bad.toml"
    p.write_text('[defaults]\nwarm_up = -1\n')
    assert main(["check-config", str(p)]) == 2
    assert "defaults.warm_up" in capsys.readouterr().err


def test_kafka_settings_are_overridable_by_environment_variables():
    env = {
        "TIDEWATCH_KAFKA_BOOTSTRAP_SERVERS": "broker-a:9092,broker-b:9092",
        "TIDEWATCH_KAFKA_INPUT_TOPICS": "fleet-metrics, edge-metrics",
        "TIDEWATCH_KAFKA_INPUT_KEYED": "false",
        "TIDEWATCH_KAFKA_PROPERTY_SECURITY_PROTOCOL": "SASL_SSL",
    }
    cfg = parse_config('[kafka]\ngroup_id = "tw"\n[kafka.properties]\n"client.id" = "x"\n', "k.toml", env)
    k = cfg.kafka
    assert k.bootstrap_servers == "broker-a:9092,broker-b:9092"
    assert k.input_topics == ("fleet-metrics", "edge-metrics")
    assert k.input_keyed is False and k.group_id == "tw"
    assert k.properties == {"client.id": "x", "security.protocol": "SASL_SSL"}


def test_no_kafka_table_means_embedded_only():
    assert parse_config("").kafka is None
    assert parse_config("", environ={}).kafka is None


def test_the_committed_json_schema_is_current(repo_root):
    import json

    from service.config import config_json_schema

    committed = json.loads((repo_root / "config" / "tidewatch.schema.json").read_text())
    assert committed == config_json_schema(), "run: tidewatch config-schema > config/tidewatch.schema.json"


def test_the_example_config_validates_against_the_json_schema(repo_root):
    # jsonschema is the reference validator here: what an editor plugin does with the schema.
    import json
    import tomllib

    import jsonschema

    schema = json.loads((repo_root / "config" / "tidewatch.schema.json").read_text())
    doc = tomllib.loads((repo_root / "config" / "tidewatch.example.toml").read_text())
    jsonschema.Draft202012Validator(schema).validate(doc)
    with pytest.raises(jsonschema.ValidationError):
        jsonschema.Draft202012Validator(schema).validate({**doc, "defaults": {"window": "5 minutes"}})


def test_the_log_level_comes_from_the_flag_then_the_environment_then_the_config(monkeypatch):
    import logging

    from service.logs import configure_logging

    monkeypatch.delenv("TIDEWATCH_LOG_LEVEL", raising=False)
    configure_logging(None, "warning")
    assert logging.getLogger("tidewatch").level == logging.WARNING
    monkeypatch.setenv("TIDEWATCH_LOG_LEVEL", "error")
    configure_logging(None, "warning")
    assert logging.getLogger("tidewatch").level == logging.ERROR
    configure_logging("debug", "warning")
    assert logging.getLogger("tidewatch").level == logging.DEBUG
    configure_logging(None, None)

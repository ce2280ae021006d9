from pathlib import Path

import pytest

from relay.core.config import build_chain, load_config, parse_config
from relay.core.errors import ConfigError
from relay.core.yamlsource import load_yaml
from tests.paths import EXAMPLES


def _config(tmp_path: Path, text: str, env: dict[str, str] | None = None):  # type: ignore[no-untyped-def]
    path = tmp_path / "relay.yaml"
    path.write_text(text)
    return load_config(path, env=env or {})


def _problems(tmp_path: Path, text: str, *, chain: bool = False) -> str:
    with pytest.raises(ConfigError) as caught:
        loaded = _config(tmp_path, text)
        if chain:
            build_chain(loaded)
    return str(caught.value)


def test_defaults(tmp_path: Path) -> None:
    config = _config(tmp_path, "stages: [normalize]\n").config
    assert config.broker.host == "127.0.0.1" and config.broker.protocol == "5"
    assert config.topics.input_qos == 1 and config.topics.output == "nlu/{source}/in"
    assert config.metrics.host == "127.0.0.1"


def test_environment_interpolation(tmp_path: Path) -> None:
    text = "broker:\n  port: ${PORT}\n  username: ${USER_NAME:-relay}\n  password: ${SECRET}\nstages: [normalize]\n"
    config = _config(tmp_path, text, env={"PORT": "1999", "SECRET": "s3cret"}).config
    assert config.broker.port == 1999
    assert config.broker.username == "relay"
    assert config.broker.password is not None and config.broker.password.get_secret_value() == "s3cret"


def test_missing_environment_variable_names_line(tmp_path: Path) -> None:
    message = _problems(tmp_path, "stages: [normalize]\nbroker:\n  password: ${NOT_SET_ANYWHERE}\n")
    assert "relay.yaml:3" in message and "NOT_SET_ANYWHERE" in message


def test_errors_name_line_field_value_and_allowed(tmp_path: Path) -> None:
    text = (
        "broker:\n"
        "  port: 70000\n"
        "  protocl: 5\n"
        "topics:\n"
        "  output: 'nlu/{source}/{mood}'\n"
        "  inputs: ['asr/#/x']\n"
        "stages: [normalize]\n"
    )
    message = _problems(tmp_path, text)
    assert "relay.yaml:2 broker.port: Input should be less than or equal to 65535, got 70000" in message
    assert "relay.yaml:3 broker.protocl: unknown setting" in message
    assert "relay.yaml:5 topics.output: unknown placeholder {mood} (allowed: {source}, {speaker}, {decision})" in message
    assert "relay.yaml:6 topics.inputs: " in message and "'asr/#/x'" in message


def test_publish_templates_refuse_wildcards(tmp_path: Path) -> None:
    assert "wildcards" in _problems(tmp_path, "topics:\n  dead_letter: 'dead/#'\nstages: [normalize]\n")
    assert "empty level" in _problems(tmp_path, "topics:\n  output: 'nlu//in'\nstages: [normalize]\n")


def test_stage_parameter_error_has_stage_location(tmp_path: Path) -> None:
    text = "stages:\n  - normalize:\n      logprob_scale: 0\n      colour: blue\n"
    message = _problems(tmp_path, text, chain=True)
    assert "relay.yaml:3 stages[0] (normalize) -> logprob_scale: Input should be greater than 0, got 0" in message
    assert "relay.yaml:4 stages[0] (normalize) -> colour: unknown setting, got 'blue'" in message


def test_an_unknown_setting_lists_the_valid_ones_where_it_was_written(tmp_path: Path) -> None:
    message = _problems(tmp_path, "stages:\n  - normalize:\n      colour: blue\n", chain=True)
    assert "colour: unknown setting, got 'blue' (valid: logprob_scale, prefer, rank_decay)" in message
    # inside a group: the group's own settings
    message = _problems(tmp_path, "stages:\n  - normalize\n  - lexicon:\n      lexicon: x.csv\n"
                        "      general: {min_scor: 0.7}\n", chain=True)
    assert "general.min_scor: unknown setting, got 0.7 (valid: " in message and " min_score, " in message
    assert "broker.hots: unknown setting, got 'x' (valid: client_id, host, " in _problems(
        tmp_path, "broker:\n  hots: x\nstages: [normalize]\n")


def test_unknown_stage_lists_valid_names(tmp_path: Path) -> None:
    message = _problems(tmp_path, "stages:\n  - normalize\n  - spellcheck\n", chain=True)
    assert "relay.yaml:3 stages[1]: Unknown stage 'spellcheck'" in message
    assert "valid stages:" in message and "normalize" in message


def test_empty_chain_is_an_error(tmp_path: Path) -> None:
    assert "names no stage" in _problems(tmp_path, "broker: {}\n", chain=True)


def test_malformed_stage_entry(tmp_path: Path) -> None:
    assert "write a stage as" in _problems(tmp_path, "stages:\n  - {a: 1, b: 2}\n")


def test_yaml_syntax_error_names_line(tmp_path: Path) -> None:
    message = _problems(tmp_path, "broker:\n  port: 1\n  host: [unclosed\n")
    assert "relay.yaml:4: not valid YAML" in message
    assert "while parsing a flow sequence started at line 3" in message


def test_duplicate_key_is_an_error(tmp_path: Path) -> None:
    assert "relay.yaml:3: key 'port' appears twice" in _problems(tmp_path, "broker:\n  port: 1\n  port: 2\n")


def test_config_hash_changes_with_content(tmp_path: Path) -> None:
    first = parse_config(load_yaml(Path("a.yaml"), text="stages: [normalize]\n"), base_dir=tmp_path).hash
    second = parse_config(load_yaml(Path("a.yaml"), text="stages: [normalize]\nlimits: {deadline_ms: 9}\n"),
                          base_dir=tmp_path).hash
    assert first != second


def test_shipped_example_configs_are_valid() -> None:
    configs = [path for path in sorted(EXAMPLES.rglob("*.yaml"))
               if path.name.startswith("relay") or path.name.endswith(".relay.yaml")]
    assert configs, f"no example configuration found under {EXAMPLES}"
    for path in configs:
        build_chain(load_config(path))


def test_a_nested_stage_setting_error_names_its_line_and_dotted_place(tmp_path: Path) -> None:
    text = ("stages:\n  - normalize\n  - lexicon:\n      lexicon: lexicon.csv\n      general:\n"
            "        margin: 0.1\n        min_score: 3\n      anchored:\n        min_scor: 0.7\n")
    message = _problems(tmp_path, text, chain=True)
    assert ("relay.yaml:7 stages[1] (lexicon) -> general.min_score: Input should be less than or equal to 2, got 3"
            in message)
    assert "relay.yaml:9 stages[1] (lexicon) -> anchored.min_scor: unknown setting, got 0.7" in message


def test_an_old_setting_name_is_located_where_it_was_written(tmp_path: Path) -> None:
    text = "stages:\n  - normalize\n  - lexicon:\n      lexicon: lexicon.csv\n      trace_top: 3\n      min_score: 3\n"
    message = _problems(tmp_path, text, chain=True)
    assert ("relay.yaml:6 stages[1] (lexicon) -> general.min_score (written as min_score): "
            "Input should be less than or equal to 2, got 3") in message


def test_one_setting_under_its_old_and_new_name_is_an_error_at_the_old_one(tmp_path: Path) -> None:
    text = ("stages:\n  - normalize\n  - lexicon:\n      lexicon: lexicon.csv\n      general: {min_score: 0.7}\n"
            "      min_score: 0.6\n")
    message = _problems(tmp_path, text, chain=True)
    assert ("relay.yaml:6 stages[1] (lexicon) -> min_score: the old name of general.min_score, which is given "
            "too; keep only general.min_score") in message

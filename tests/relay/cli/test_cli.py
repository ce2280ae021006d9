from pathlib import Path

import pytest

from relay.cli import main
from tests.paths import WORKSHOP


def test_help_lists_every_command(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as caught:
        main(["--help"])
    assert caught.value.code == 0
    out = capsys.readouterr().out
    for command in ("run", "check", "stages", "demo", "build-lm", "eval", "tune", "learn-costs", "augment"):
        # argparse puts the longest command's help on the next line
        assert f"\n    {command} " in out or f"\n    {command}\n" in out


def test_check_names_line_and_field(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = tmp_path / "relay.yaml"
    path.write_text("stages:\n  - normalize\n  - lexicon:\n      lexicon: lexicon.csv\n      max_span_words: 9\n")
    assert main(["check", str(path)]) == 2
    err = capsys.readouterr().err
    assert "relay.yaml:5 stages[1] (lexicon) -> max_span_words: Input should be less than or equal to 8, got 9" in err
    assert "Traceback" not in err


def test_check_reports_a_bad_lexicon_by_line_and_prints_no_verdict(tmp_path: Path,
                                                                   capsys: pytest.CaptureFixture[str]) -> None:
    (tmp_path / "lexicon.csv").write_text("id,type,name\nx.1,place,bay one\nx.2,place,\n")
    path = tmp_path / "relay.yaml"
    path.write_text("stages:\n  - normalize\n  - lexicon:\n      lexicon: lexicon.csv\n")
    assert main(["check", str(path)]) == 2
    captured = capsys.readouterr()
    assert "lexicon.csv:3: name is required" in captured.err
    assert "valid" not in captured.out


def test_check_loads_the_example_chain(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["check", str(WORKSHOP / "relay.yaml")]) == 0
    out = capsys.readouterr().out
    assert "valid (config hash" in out and "4. gate" in out


def test_stages_lists_each_stage_with_its_settings(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["stages"]) == 0
    out = capsys.readouterr().out
    for name in ("normalize:", "lm_rescore:", "lexicon:", "gate:"):
        assert name in out
    assert "logprob_scale" in out and "unavailable" not in out
    # A group's settings by dotted name, each with its default and description.
    assert "    general:                     the general search's guards\n" in out
    assert "    general.min_score            default 0.6  least entry score for a correction\n" in out


def test_check_names_old_setting_names(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    (tmp_path / "lexicon.csv").write_text("id,type,name\nplace.bay_1,place,bay one\n")
    path = tmp_path / "relay.yaml"
    path.write_text("stages:\n  - normalize\n  - lexicon:\n      lexicon: lexicon.csv\n      type_hints: {place: [in]}\n"
                    "      general: {margin: 0.1}\n      min_score: 0.7\n")
    assert main(["check", str(path), "--no-load"]) == 0
    out = capsys.readouterr().out
    assert "  lexicon: old setting names min_score (now general.min_score), type_hints (now hints)\n" in out
    path.write_text("stages:\n  - normalize\n  - lexicon:\n      lexicon: lexicon.csv\n      general: {min_score: 0.7}\n")
    assert main(["check", str(path), "--no-load"]) == 0
    assert "old setting names" not in capsys.readouterr().out

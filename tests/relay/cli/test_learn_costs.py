"""`rehear learn-costs`: its help, a run end to end, and bad input refused without a traceback."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import pytest

from relay.cli import main
from stages.lexicon.sound.costfile import read_costs
from tests.relay.workbench.test_confusions import LEXICON, line


def write(tmp_path: Path, lines: list[dict[str, Any]], *, extra: str = "") -> tuple[Path, Path]:
    (tmp_path / "lexicon.csv").write_text(LEXICON)
    path = tmp_path / "corpus.jsonl"
    path.write_text("".join(json.dumps(x) + "\n" for x in lines) + extra)
    return path, tmp_path / "lexicon.csv"


LINES = [line(1, "check the kerf", ["check the curve"], [("term.kerf", "kerf")]),
         line(2, "call tamsin okoro now", ["call tam sin a core oh now"], [("person.tamsin_okoro", "tamsin okoro")]),
         line(3, "fetch the kit", ["fetch the kid", "fetch the kit"], [])]


def test_help_explains_the_command_and_its_file(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as caught:
        main(["learn-costs", "--help"])
    assert caught.value.code == 0
    out = capsys.readouterr().out
    for words in ("match.costs", "P(heard phone | said phone)", "--focus", "--hypotheses", "--prior-weight",
                  "One recogniser per file", "stages/lexicon/README.md"):
        assert words in out


def test_a_run_writes_a_cost_file_the_stage_reads(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    corpus, lexicon = write(tmp_path, LINES)
    out = tmp_path / "sounds.json"
    assert main(["learn-costs", str(corpus), "--lexicon", str(lexicon), "-o", str(out), "--iterations", "2"]) == 0
    printed = capsys.readouterr().out
    assert "3 utterances of recogniser example" in printed and f"wrote {out}" in printed
    read_costs(out)  # raises if the stage could not read it
    provenance = json.loads(out.read_text())["provenance"]
    assert provenance["recogniser"] == "example" and provenance["corpus"] == [str(corpus)]
    assert provenance["utterances"] == 3 and len(provenance["counts"]["said_heard"]) == 39


@pytest.mark.parametrize("lines, extra, args, expected", [
    (LINES, '{"id": "c-9", "reference": \n', [], "corpus.jsonl:4: not valid JSON"),
    (LINES + [line(4, "call sam", ["call sam"], [("person.sam", "sam")])], "", [],
     "corpus.jsonl:4: entity 'person.sam' is not in the lexicon"),
    (LINES + [line(4, "call tamsin", ["call tamsin"], [], recogniser="other")], "", [],
     "several recognisers (example, other); learn one at a time, e.g. --where recogniser=example"),
    (LINES, "", ["--where", "recogniser=nobody"], "matches recogniser=nobody"),
])
def test_bad_input_is_refused_cleanly(tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch,
                                      lines: list[dict[str, Any]], extra: str, args: list[str], expected: str) -> None:
    monkeypatch.chdir(tmp_path)
    corpus, lexicon = write(tmp_path, lines, extra=extra)
    output = [] if "-o" in args else ["-o", "sounds.json"]
    assert main(["learn-costs", str(corpus), "--lexicon", str(lexicon), *output, *args]) == 2
    err = capsys.readouterr().err
    assert expected in err and "Traceback" not in err
    assert not (tmp_path / "sounds.json").exists()


def test_an_output_path_that_cannot_be_written_is_refused_before_any_work(
        tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.chdir(tmp_path)
    corpus, lexicon = write(tmp_path, LINES)
    with pytest.raises(SystemExit) as stopped:
        main(["learn-costs", str(corpus), "--lexicon", str(lexicon), "-o", "missing-folder/sounds.json"])
    assert stopped.value.code == 2
    err = capsys.readouterr().err
    assert "rehear learn-costs: argument -o/--output: cannot write missing-folder/sounds.json: " \
           "no directory missing-folder" in err and "Traceback" not in err


def test_missing_files_are_named(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    corpus, lexicon = write(tmp_path, LINES)
    assert main(["learn-costs", str(tmp_path / "none.jsonl"), "--lexicon", str(lexicon), "-o",
                 str(tmp_path / "s.json")]) == 2
    assert "none.jsonl: cannot read" in capsys.readouterr().err
    (tmp_path / "bad.csv").write_text("id,type,name\nx.1,place,\n")
    assert main(["learn-costs", str(corpus), "--lexicon", str(tmp_path / "bad.csv"), "-o",
                 str(tmp_path / "s.json")]) == 2
    err = capsys.readouterr().err
    assert "bad.csv:2: name is required" in err and "Traceback" not in err


def test_option_values_are_checked(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    corpus, lexicon = write(tmp_path, LINES)
    with pytest.raises(SystemExit) as caught:
        main(["learn-costs", str(corpus), "--lexicon", str(lexicon), "-o", "x.json", "--hypotheses", "0"])
    assert caught.value.code == 2
    assert "--hypotheses: '0': give a whole number of at least 1" in capsys.readouterr().err

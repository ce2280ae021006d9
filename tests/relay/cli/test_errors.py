"""Every command fails the same way: output paths refused before any work, one prefix
(`rehear VERB:`), the documented exit statuses, no traceback for a user's mistake."""

from __future__ import annotations

import importlib.util
import os
import re
import subprocess
import sys
from pathlib import Path

import pytest

from relay.cli import build_parser, main
from relay.cli.common import EXIT_STATUS
from tests.paths import ROOT, WORKSHOP
from tests.relay.workbench.corpus_fixtures import write_config, write_corpus

COMMANDS = ("run", "check", "stages", "demo", "starter", "build-lm", "label", "eval", "tune", "learn-costs", "augment")


def _refused(argv: list[str], capsys: pytest.CaptureFixture[str]) -> str:
    with pytest.raises(SystemExit) as stopped:
        main(argv)
    assert stopped.value.code == 2
    err = capsys.readouterr().err
    assert "Traceback" not in err
    return err


@pytest.mark.parametrize("verb, option", [
    ("eval", "--report"), ("eval", "--json"), ("eval", "--results"), ("tune", "-o"), ("tune", "--json"),
    ("augment", "-o"), ("augment", "--aliases"), ("build-lm", "-o"), ("build-lm", "--binary"),
    ("starter", "-o"), ("label", "-o"),
])
def test_an_unwritable_output_is_refused_before_any_work(verb: str, option: str, tmp_path: Path,
                                                         capsys: pytest.CaptureFixture[str]) -> None:
    corpus = write_corpus(tmp_path / "corpus.jsonl", 5)
    config = write_config(tmp_path / "relay.yaml")
    lexicon = WORKSHOP / "lexicon.csv"
    given = {
        "eval": [str(corpus), "--config", str(config)],
        "tune": [str(corpus), "--config", str(config), "-o", str(tmp_path / "t.yaml")],
        "augment": [str(corpus), "--lexicon", str(lexicon), "-o", str(tmp_path / "a.jsonl")],
        "build-lm": [str(WORKSHOP / "train.txt"), "-o", str(tmp_path / "m.arpa")],
        "starter": ["--lexicon", str(lexicon), "--text", str(WORKSHOP / "train.txt"), "-o", str(tmp_path / "r.yaml")],
        "label": [str(corpus), "--config", str(config), "-o", str(tmp_path / "l.jsonl")],
    }[verb]
    bad = "/nonexistent-folder/out.file"
    if option in given:
        given[given.index(option) + 1] = bad
    else:
        given += [option, bad]
    err = _refused([verb, *given], capsys)
    assert f"rehear {verb}: argument {option}" in err
    assert f"cannot write {bad}: no directory /nonexistent-folder" in err
    directory = _refused([verb, *[str(tmp_path) if value == bad else value for value in given]], capsys)
    assert "it is a directory" in directory


def test_a_report_without_matplotlib_names_the_extra_before_the_run(tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                                                     capsys: pytest.CaptureFixture[str]) -> None:
    real = importlib.util.find_spec
    monkeypatch.setattr(importlib.util, "find_spec", lambda name, *a: None if name == "matplotlib" else real(name, *a))
    corpus = write_corpus(tmp_path / "corpus.jsonl", 5)
    code = main(["eval", str(corpus), "--config", str(write_config(tmp_path / "relay.yaml")),
                 "--report", str(tmp_path / "r.html")])
    captured = capsys.readouterr()
    assert code == 2
    assert captured.err == ("rehear eval: --report needs matplotlib, which is not installed: "
                            "pip install 'rehear[report]'\n")
    assert captured.out == ""  # refused before the evaluation ran


@pytest.mark.parametrize("verb", ["eval", "tune", "augment", "learn-costs"])
def test_broken_jsonl_is_the_same_fault_everywhere(verb: str, tmp_path: Path,
                                                   capsys: pytest.CaptureFixture[str]) -> None:
    corpus = write_corpus(tmp_path / "corpus.jsonl", 3)
    corpus.write_text(corpus.read_text() + '{"id": "x", "reference": \n')
    extra = {"eval": ["--config", str(write_config(tmp_path / "relay.yaml"))],
             "tune": ["--config", str(write_config(tmp_path / "relay.yaml")), "-o", str(tmp_path / "t.yaml")],
             "augment": ["--lexicon", str(WORKSHOP / "lexicon.csv"), "-o", str(tmp_path / "a.jsonl")],
             "learn-costs": ["--lexicon", str(WORKSHOP / "lexicon.csv"), "-o", str(tmp_path / "c.json")]}[verb]
    assert main([verb, str(corpus), *extra]) == 2
    err = capsys.readouterr().err
    assert err.startswith(f"rehear {verb}: {corpus}:4: not valid JSON")
    assert "Traceback" not in err


def test_a_corpus_that_is_not_utf8_says_so_at_its_line(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    corpus = write_corpus(tmp_path / "corpus.jsonl", 2)
    corpus.write_bytes(corpus.read_bytes() + '{"id": "x", "reference": "caf\u00e9"}\n'.encode("latin-1"))
    assert main(["eval", str(corpus), "--config", str(write_config(tmp_path / "relay.yaml"))]) == 2
    assert capsys.readouterr().err == (f"rehear eval: {corpus}:3: not UTF-8 text (byte 30 of the line is 0xe9); "
                                       "save the file as UTF-8\n")


def test_corpus_entity_ids_missing_from_the_lexicon_are_refused(tmp_path: Path,
                                                                capsys: pytest.CaptureFixture[str]) -> None:
    lexicon = tmp_path / "lexicon.csv"
    lexicon.write_text("id,type,name\nmachine.kiln,machine,kiln\n")
    config = tmp_path / "relay.yaml"
    config.write_text("domain: {lexicon: lexicon.csv}\nstages:\n  - normalize\n  - lexicon\n  - gate\n")
    corpus = write_corpus(tmp_path / "corpus.jsonl", 40)  # some lines name machine.lathe
    assert main(["eval", str(corpus), "--config", str(config)]) == 2
    err = capsys.readouterr().err
    assert re.match(rf"rehear eval: {re.escape(str(corpus))}:\d+: entity id 'machine.lathe' is not in the lexicon "
                    rf"{re.escape(str(lexicon))}; \d+ more: machine.lathe \(\d+\)", err), err


def test_check_without_loading_still_finds_a_missing_lexicon(tmp_path: Path,
                                                             capsys: pytest.CaptureFixture[str]) -> None:
    config = tmp_path / "relay.yaml"
    config.write_text("domain: {lexicon: nowhere.csv}\nstages:\n  - normalize\n  - lexicon\n")
    assert main(["check", str(config), "--no-load"]) == 2
    err = capsys.readouterr().err
    assert err.startswith(f"rehear check: Invalid configuration {config}")
    assert f"lexicon file {tmp_path / 'nowhere.csv'} does not exist" in err
    assert "valid" not in capsys.readouterr().out


def test_every_help_explains_the_exit_statuses_and_points_at_sections_that_exist(
        capsys: pytest.CaptureFixture[str]) -> None:
    parser = build_parser()
    headings = re.findall(r"^## (\d+)\. (.+)$", (ROOT / "docs/formats.md").read_text(), flags=re.M)
    sections = {int(number): title.lower() for number, title in headings}
    # The numbers the code cites (FORMATS.md's) name these formats.
    assert [sections[n].split(" (")[0] for n in range(1, 6)] == [
        "recogniser message", "cleaned message", "lexicon", "in-domain text", "labelled corpus"]
    for verb in COMMANDS:
        with pytest.raises(SystemExit) as stopped:
            parser.parse_args([verb, "--help"])
        assert stopped.value.code == 0
        text = capsys.readouterr().out
        assert EXIT_STATUS in text, verb
        for number in re.findall(r"formats\.md\s+section\s+(\d+)", text):
            assert int(number) in sections, (verb, number)
        assert "FORMATS" not in text, verb


def test_a_file_read_under_another_name_section_matches_its_subject() -> None:
    """Each "section N" the code cites names the format around it."""
    keywords = {1: ("recogniser", "message", "source"), 2: ("cleaned", "output"), 3: ("lexicon",),
                4: ("in-domain", "text"), 5: ("corpus", "labelled"), 6: ("capture",)}
    for path in [*ROOT.glob("relay/**/*.py"), *ROOT.glob("stages/**/*.py")]:
        text = " ".join(path.read_text().split())
        for match in re.finditer(r"(?:FORMATS|formats\.md)(?: section)? (\d)", text):
            around = text[max(0, match.start() - 160):match.end() + 60].lower()
            assert any(word in around for word in keywords[int(match.group(1))]), (path, around)


def test_no_progress_bar_when_stderr_is_not_a_terminal(tmp_path: Path) -> None:
    corpus = write_corpus(tmp_path / "corpus.jsonl", 120)  # above the size that would draw one
    done = subprocess.run([sys.executable, "-m", "relay.cli.eval", str(corpus), "--config",
                           str(write_config(tmp_path / "relay.yaml"))],
                          capture_output=True, text=True, timeout=120, cwd=ROOT)
    assert done.returncode == 0, done.stderr
    assert done.stderr == ""


def test_kenlm_load_notice_goes_to_the_log_not_to_raw_stderr(tmp_path: Path) -> None:
    script = ("import logging, sys; from pathlib import Path; from stages.lm.model import load_model; "
              "logging.basicConfig(stream=sys.stdout, format='%(name)s %(message)s', level=logging.INFO); "
              f"load_model(Path({str(WORKSHOP / 'workshop.arpa')!r}))")
    done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=60, cwd=ROOT)
    assert done.returncode == 0, done.stderr
    assert done.stderr == ""
    assert "rehear.lm loading an ARPA language model; its binary form loads faster" in done.stdout


@pytest.mark.parametrize("mask, mode", [(0o022, 0o644), (0o027, 0o640)])
def test_build_lm_writes_the_model_with_the_umask(mask: int, mode: int, tmp_path: Path) -> None:
    old = os.umask(mask)
    try:
        assert main(["build-lm", str(WORKSHOP / "train.txt"), "--lexicon", str(WORKSHOP / "lexicon.csv"), "-o",
                     str(tmp_path / "m.arpa")]) == 0
    finally:
        os.umask(old)
    assert (tmp_path / "m.arpa").stat().st_mode & 0o777 == mode


def test_build_lm_binary_needs_a_builder_and_says_which(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["build-lm", str(WORKSHOP / "train.txt"), "-o", str(tmp_path / "m.arpa"), "--binary",
                 str(tmp_path / "m.bin"), "--build-binary", "no-such-builder"]) == 2
    assert "needs kenlm's build_binary program; 'no-such-builder' is not found" in capsys.readouterr().err
    assert not (tmp_path / "m.arpa").exists()  # refused before the model was built


def test_build_lm_binary_runs_the_builder_and_reports_its_failure(tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                                                  capsys: pytest.CaptureFixture[str]) -> None:
    # A stand-in for kenlm's build_binary with its calling convention (ARPA in, binary out).
    builder = tmp_path / "fake_build_binary"
    builder.write_text("#!/bin/sh\n[ \"$FAIL\" = 1 ] && { echo 'bad ARPA' >&2; exit 3; }\n"
                       "head -c 100 \"$1\" > \"$2\"\n")
    builder.chmod(0o755)
    args = ["build-lm", str(WORKSHOP / "train.txt"), "--lexicon", str(WORKSHOP / "lexicon.csv"), "-o",
            str(tmp_path / "m.arpa"), "--binary",
            str(tmp_path / "m.bin"), "--build-binary", str(builder)]
    assert main(args) == 0
    assert (tmp_path / "m.bin").read_bytes() == (tmp_path / "m.arpa").read_bytes()[:100]
    monkeypatch.setenv("FAIL", "1")
    (tmp_path / "m.bin").unlink()
    capsys.readouterr()
    assert main(args) == 1
    err = capsys.readouterr().err
    assert f"rehear build-lm: {builder} failed on {tmp_path / 'm.arpa'} (exit 3): bad ARPA" in err
    assert not (tmp_path / "m.bin").exists()
    assert not list(tmp_path.glob(".m.bin*"))

"""`rehear build-lm`: input formats, slot expansion, tokenisation, bad input, atomic output."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from relay.cli.build_lm import main
from relay.core.errors import InputError
from stages.indomain.text import TextOptions, read_sentences, read_slot_values
from stages.lm.arpa import read_arpa
from tests.paths import DATA, ROOT


def _unigrams(path: Path) -> set[str]:
    return {gram[0] for gram in read_arpa(path)[0]}


def test_plain_text_builds_a_model(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "lm.arpa"
    assert main([str(DATA / "lm_domain.txt"), "-o", str(out), "--order", "3"]) == 0
    levels = read_arpa(out)
    assert len(levels) == 3
    assert {"<s>", "</s>", "<unk>", "lathe", "kiln"} <= _unigrams(out)
    assert "wrote" in capsys.readouterr().err
    assert [p.name for p in tmp_path.iterdir()] == ["lm.arpa"]  # no temporary left behind


def test_raw_mode_reproduces_the_reference_model(tmp_path: Path) -> None:
    # Same text and order as tests/data/kn_corpus.lmplz.o3.arpa (lmplz, see tests/data/README.md).
    out = tmp_path / "lm.arpa"
    assert main([str(DATA / "kn_corpus.txt"), "-o", str(out), "--order", "3", "--raw"]) == 0
    ours, reference = read_arpa(out), read_arpa(DATA / "kn_corpus.lmplz.o3.arpa")
    assert len(ours) == len(reference) == 3  # zip below would stop at the shorter one
    for mine, theirs in zip(ours, reference):
        assert mine.keys() == theirs.keys()
        assert max(abs(mine[g][0] - theirs[g][0]) for g in mine) < 1e-4


def test_tokeniser_is_the_runtime_one_and_raw_keeps_text(tmp_path: Path) -> None:
    text = tmp_path / "t.txt"
    text.write_text("Book Bay 3 at 2:30, please!\n\n", encoding="utf-8")
    assert list(read_sentences([text])) == [["book", "bay", "three", "at", "two", "thirty", "please"]]
    assert list(read_sentences([text], options=TextOptions(raw=True))) == [
        ["Book", "Bay", "3", "at", "2:30,", "please!"]
    ]


def test_csv_and_jsonl_text_columns(tmp_path: Path) -> None:
    csv_file = tmp_path / "t.csv"
    csv_file.write_text('id,text\n1,"open the dock, please"\n2,close the dock\n', encoding="utf-8")
    jsonl = tmp_path / "t.jsonl"
    jsonl.write_text(json.dumps({"text": "page the desk", "id": 3}) + "\n\n" + json.dumps({"text": "stop"}) + "\n")
    sentences = list(read_sentences([csv_file, jsonl]))
    assert sentences == [["open", "the", "dock", "please"], ["close", "the", "dock"], ["page", "the", "desk"],
                         ["stop"]]


@pytest.mark.parametrize("lexicon", ["slots_lexicon.csv", "slots_lexicon.yaml"])
def test_slots_expand_from_lexicon_names_and_aliases(lexicon: str, tmp_path: Path) -> None:
    slots = read_slot_values(DATA / lexicon)
    assert slots["machine"][:3] == ["lathe", "wood lathe", "kiln"]
    text = tmp_path / "t.txt"
    text.write_text("book the {machine} now\n", encoding="utf-8")
    sentences = [" ".join(s) for s in read_sentences([text], slots=slots)]
    assert sentences == [f"book the {form} now" for form in slots["machine"]]


def test_json_lexicon(tmp_path: Path) -> None:
    lexicon = tmp_path / "lex.json"
    lexicon.write_text(json.dumps([{"id": "p.1", "type": "person", "name": "ola brandvik", "aliases": ["ola"]}]))
    assert read_slot_values(lexicon) == {"person": ["ola brandvik", "ola"]}


def test_expansions_are_capped_and_seeded(tmp_path: Path) -> None:
    slots = read_slot_values(DATA / "slots_lexicon.csv")  # 6 machine forms x 4 person forms = 24
    text = tmp_path / "t.txt"
    text.write_text("book the {machine} for {person}\nbook the {machine} for {person}'s team\n", encoding="utf-8")

    def run(seed: int) -> list[str]:
        options = TextOptions(max_expansions=5, seed=seed)
        return [" ".join(s) for s in read_sentences([text], slots=slots, options=options)]

    first = run(0)
    assert len(first) == 10
    assert len(set(first[:5])) == 5  # distinct combinations, no repeats
    assert first == run(0)
    assert first != run(1)
    assert any("'s team" in s for s in first)


def test_cli_expands_slots_with_lexicon(tmp_path: Path) -> None:
    text = tmp_path / "t.txt"
    text.write_text("page {person} to the {place}\n", encoding="utf-8")
    out = tmp_path / "lm.arpa"
    assert main([str(text), "-o", str(out), "--lexicon", str(DATA / "slots_lexicon.csv"), "--order", "2"]) == 0
    assert {"brandvik", "ashcombe", "dock", "wet"} <= _unigrams(out)


def _bad_inputs(tmp_path: Path) -> list[tuple[str, bytes, str]]:
    return [
        ("empty.txt", b"\n  \n", "no words"),
        ("long.txt", b"fine line\n" + b"a " * 50_000 + b"\n", "long.txt:2: line of 100000 characters"),
        ("latin1.txt", b"ok\ncaf\xe9 open\n", "latin1.txt:2: not UTF-8"),
        ("slot.txt", b"book the {machine}\nbook the {gadget}\n", "slot.txt:2: unknown slot type {gadget}"),
        ("bos.txt", b"one\ntwo\n<s> three\n", "bos.txt:3: <s> is reserved"),
        ("eos.txt", b"stop here </s>\n", "eos.txt:1: </s> is reserved"),
        ("unk.txt", b"a b\nan <UNK> word\n", "unk.txt:2: <UNK> is reserved"),
        ("bad.jsonl", b'{"text": "ok"}\n{"txt": "no"}\n', 'bad.jsonl:2: needs a string field "text"'),
        ("bad.csv", b"id,words\n1,hello\n", 'bad.csv:1: CSV header needs a "text" column'),
    ]


def test_bad_input_is_a_clear_error_and_nothing_is_written(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out = tmp_path / "out" / "lm.arpa"
    out.parent.mkdir()
    out.write_text("previous model\n")
    for name, content, message in _bad_inputs(tmp_path):
        source = tmp_path / name
        source.write_bytes(content)
        code = main([str(source), "-o", str(out), "--lexicon", str(DATA / "slots_lexicon.csv")])
        err = capsys.readouterr().err
        assert code == 2, name
        assert message in err, (name, err)
        assert "Traceback" not in err
        assert out.read_text() == "previous model\n"  # untouched
        assert [p.name for p in out.parent.iterdir()] == ["lm.arpa"]


def test_raw_mode_rejects_reserved_tokens_and_slots_need_a_lexicon(tmp_path: Path) -> None:
    source = tmp_path / "t.txt"
    source.write_text("fine\nsay <unk> here\n")
    with pytest.raises(InputError, match=r"t.txt:2: <unk> is reserved"):
        list(read_sentences([source], options=TextOptions(raw=True)))
    source.write_text("book the {machine}\n")
    with pytest.raises(InputError, match=r"t.txt:1: slot \{machine\} needs a lexicon"):
        list(read_sentences([source]))


def test_runs_as_a_module_and_fails_without_traceback(tmp_path: Path) -> None:
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    command = [sys.executable, "-m", "relay.cli.build_lm"]
    shown = subprocess.run(command + ["--help"], capture_output=True, text=True, env=env, check=True)
    assert "--lexicon" in shown.stdout and "{type}" in shown.stdout
    bad = tmp_path / "bad.txt"
    bad.write_bytes(b"\xff\xfe\n")
    failed = subprocess.run(command + [str(bad), "-o", str(tmp_path / "lm.arpa")],
                            check=False, capture_output=True, text=True, env=env)
    assert failed.returncode == 2
    assert "bad.txt:1: not UTF-8" in failed.stderr
    assert "Traceback" not in failed.stderr
    assert not (tmp_path / "lm.arpa").exists()


def test_order_below_two_is_refused(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as stopped:
        main([str(DATA / "lm_domain.txt"), "-o", str(tmp_path / "lm.arpa"), "--order", "1"])
    assert stopped.value.code == 2
    assert "must be at least 2" in capsys.readouterr().err

"""Reading and checking lexicon and speaker files: every error names the file and the line."""

from __future__ import annotations

import re
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pytest

from relay.core.errors import ConfigError
from stages.lexicon.data import read_lexicon, read_speakers

GOOD_CSV = """id,type,name,aliases,say,weight
machine.kiln,machine,marrow kiln,the kiln|kiln,,1.5
term.kerf,term,kerf,,kurf,
person.ana,person,ana ruiz,ana,/AA1 N AH0 R UW0 IY1 S/,0.8
"""


def write(tmp_path: Path, name: str, text: str) -> Path:
    path = tmp_path / name
    path.write_text(text)
    return path


def problems(read: Callable[..., object], *args: Any) -> list[str]:
    """What ``read(*args)`` finds wrong: it must refuse the file with a ConfigError."""
    with pytest.raises(ConfigError) as exc:
        read(*args)
    return exc.value.problems


def test_csv_reads_all_columns(tmp_path: Path) -> None:
    entries = read_lexicon(write(tmp_path, "lex.csv", GOOD_CSV))
    assert [e.id for e in entries] == ["machine.kiln", "term.kerf", "person.ana"]
    kiln = entries[0]
    assert kiln.aliases == ("the kiln", "kiln") and kiln.weight == 1.5 and kiln.line == 2
    assert kiln.forms == ("marrow kiln", "the kiln", "kiln")
    assert entries[1].weight == 1.0 and entries[1].say == "kurf"


def test_yaml_and_json_records_read_the_same(tmp_path: Path) -> None:
    yaml_text = """
- id: machine.kiln
  type: machine
  name: marrow kiln
  aliases: [the kiln, kiln]
  weight: 1.5
- {id: term.kerf, type: term, name: kerf, say: kurf}
"""
    json_text = """{"entries": [
  {"id": "machine.kiln", "type": "machine", "name": "marrow kiln", "aliases": "the kiln|kiln", "weight": 1.5},
  {"id": "term.kerf", "type": "term", "name": "kerf", "say": "kurf"}
]}"""
    from_yaml = read_lexicon(write(tmp_path, "lex.yaml", yaml_text))
    from_json = read_lexicon(write(tmp_path, "lex.json", json_text))
    assert [(e.id, e.aliases, e.weight) for e in from_yaml] == [(e.id, e.aliases, e.weight) for e in from_json]
    assert [e.line for e in from_yaml] == [2, 7]
    assert [e.line for e in from_json] == [2, 3]


def test_every_problem_is_reported_with_file_and_line(tmp_path: Path) -> None:
    text = """id,type,name,aliases,say,weight
a,term,alpha,,,1
a,term,again,,,1
b,term,,,,1
c,term,gamma,,/QQ/,1
d,term,delta,,,heavy
e,term,epsilon,,,-2
f,,phi,,,1
"""
    path = write(tmp_path, "bad.csv", text)
    found = problems(read_lexicon, path)
    expected = [(3, "duplicate id 'a' (first on line 2)"), (4, "name is required"),
                (5, "say '/QQ/' cannot be read"), (6, "weight must be a number"),
                (7, "weight must be a positive"), (8, "type is required")]
    assert len(found) == len(expected)
    for (line, message), problem in zip(expected, found):
        assert problem.startswith(f"{path}:{line}: "), problem
        assert message in problem


def test_yaml_errors_carry_the_record_line(tmp_path: Path) -> None:
    path = write(tmp_path, "bad.yaml", "- id: a\n  type: t\n  name: alpha\n- id: b\n  type: t\n  name: ''\n")
    assert problems(read_lexicon, path) == [f"{path}:4: name is required and must be non-empty text"]


def test_broken_json_names_its_line(tmp_path: Path) -> None:
    path = write(tmp_path, "bad.json", '[\n {"id": "a",\n  "type": }\n]')
    assert re.match(rf"{re.escape(str(path))}:3: ", problems(read_lexicon, path)[0])


def test_a_misspelt_header_is_one_problem_at_line_1_with_the_valid_columns(tmp_path: Path) -> None:
    rows = "".join(f"a{i},t,alpha {i},1\n" for i in range(50))
    path = write(tmp_path, "lex.csv", "id,type,name,wieght\n" + rows)
    assert problems(read_lexicon, path) == [f"{path}:1: header: unknown column(s) wieght",
                                            f"{path}:1: valid columns: id, type, name, aliases, say, weight"]
    path = write(tmp_path, "lex2.csv", "id,type,label\n" + rows)
    assert problems(read_lexicon, path)[:2] == [f"{path}:1: header: unknown column(s) label",
                                                f"{path}:1: header: missing required column(s) name"]


def test_a_row_with_more_fields_than_the_header_says_so(tmp_path: Path) -> None:
    path = write(tmp_path, "lex.csv", "id,type,name\na,t,alpha\nb,t,smith, jo\n")
    assert problems(read_lexicon, path) == [
        f'{path}:3: 1 field(s) more than the header\'s 3 columns (a name with a comma needs "quotes")']


def test_an_unknown_key_in_a_yaml_record_lists_the_valid_ones(tmp_path: Path) -> None:
    path = write(tmp_path, "lex.yaml", "- {id: a, type: t, name: alpha, colour: red}\n")
    assert problems(read_lexicon, path) == [
        f"{path}:1: unknown column(s) colour (valid: id, type, name, aliases, say, weight)"]


def test_speakers_file(tmp_path: Path) -> None:
    path = write(tmp_path, "sp.csv", "speaker,id,affinity\nm1,a,0.9\nm1,b,0.2\nm2,a,1\n")
    assert read_speakers(path, {"a", "b"}) == {"m1": {"a": 0.9, "b": 0.2}, "m2": {"a": 1.0}}


def test_speakers_file_errors(tmp_path: Path) -> None:
    path = write(tmp_path, "sp.csv", "speaker,id,affinity\nm1,a,1.5\nm1,zz,0.5\nm2,a,high\n")
    found = problems(read_speakers, path, {"a"})
    assert [p.split(": ", 1)[0] for p in found] == [f"{path}:2", f"{path}:3", f"{path}:4"]
    assert "in [0, 1]" in found[0] and "not in the lexicon" in found[1]

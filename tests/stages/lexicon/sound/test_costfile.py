"""The learned phone cost file: round trip, orientation, errors that name the file, and the stage setting."""

from __future__ import annotations

import json
import os
import random
import stat
from pathlib import Path
from typing import Any

import pytest

from relay.cli import main
from relay.core.errors import ConfigError
from stages.lexicon.sound.costfile import read_costs, write_costs
from stages.lexicon.sound.phonetics import PHONES, CostModel, alignment_cost, encode
from tests.stages.lexicon.fixtures import run, small_chain

INDEX = {phone: i for i, phone in enumerate(PHONES)}


def asymmetric_model(seed: int = 1) -> CostModel:
    """Costs no hand table would give: every direction its own value, zero only on the diagonal."""
    rng = random.Random(seed)
    size = len(PHONES)
    sub = tuple(tuple(0.0 if h == s else round(rng.uniform(0.05, 1.0), 4) for s in range(size)) for h in range(size))
    return CostModel(sub, tuple(round(rng.uniform(0.1, 1.0), 4) for _ in range(size)),
                     tuple(round(rng.uniform(0.1, 1.0), 4) for _ in range(size)))


def test_a_written_model_reads_back_the_same(tmp_path: Path) -> None:
    model = asymmetric_model()
    path = tmp_path / "costs.json"
    write_costs(path, model, {"corpus": ["a.jsonl"], "recogniser": "example"})
    again = read_costs(path)
    assert again == model  # the three cost tables, value for value
    assert json.loads(path.read_text())["provenance"]["recogniser"] == "example"
    assert list(path.parent.iterdir()) == [path]  # no temporary file left behind


def test_a_written_model_is_readable_as_the_umask_allows(tmp_path: Path) -> None:
    # A relay running as another user reads the file: not the 0600 of a temporary file.
    old = os.umask(0o022)
    try:
        write_costs(tmp_path / "costs.json", asymmetric_model(), {})
    finally:
        os.umask(old)
    assert stat.S_IMODE((tmp_path / "costs.json").stat().st_mode) == 0o644


def test_rows_are_said_and_columns_heard(tmp_path: Path) -> None:
    # Said P heard as B is cheap, said B heard as P dear: the aligner takes the heard phones first.
    data = _hand_file()
    p, b = data["phones"].index("P"), data["phones"].index("B")
    data["substitution"][p][b], data["substitution"][b][p] = 0.05, 0.9
    data["deletion"][data["phones"].index("T")] = 0.1  # said T lost: cheap
    data["insertion"][data["phones"].index("T")] = 0.8  # T heard where nothing was said: dear
    path = tmp_path / "costs.json"
    path.write_text(json.dumps(data))
    model = read_costs(path)
    assert alignment_cost(encode("B AE T".split()), encode("P AE T".split()), model) == pytest.approx(0.05)
    assert alignment_cost(encode("P AE T".split()), encode("B AE T".split()), model) == pytest.approx(0.9)
    assert alignment_cost(encode("K AE".split()), encode("K AE T".split()), model) == pytest.approx(0.1)
    assert alignment_cost(encode("K AE T".split()), encode("K AE".split()), model) == pytest.approx(0.8)


def test_phones_may_come_in_any_order(tmp_path: Path) -> None:
    model = asymmetric_model(2)
    path = tmp_path / "costs.json"
    write_costs(path, model, {})
    data = json.loads(path.read_text())
    order = list(range(len(PHONES)))[::-1]
    data["phones"] = [data["phones"][i] for i in order]
    data["substitution"] = [[data["substitution"][r][c] for c in order] for r in order]
    data["deletion"] = [data["deletion"][i] for i in order]
    data["insertion"] = [data["insertion"][i] for i in order]
    path.write_text(json.dumps(data))
    assert read_costs(path) == model


def _hand_file() -> dict[str, Any]:
    hand = CostModel.features()
    size = len(PHONES)
    return {"format": "rehear-phone-costs", "version": 1, "phones": list(PHONES),
            "substitution": [[hand.substitution[h][s] for h in range(size)] for s in range(size)],
            "deletion": list(hand.deletion), "insertion": list(hand.insertion), "provenance": {}}


@pytest.mark.parametrize("change, expected", [
    (lambda d: "{not json", "line 1 column 2: not valid JSON"),
    (lambda d: [1, 2], "expected a JSON object"),
    (lambda d: d | {"substitutions": []}, "unknown key 'substitutions'"),
    (lambda d: {k: v for k, v in d.items() if k != "deletion"}, "missing key 'deletion'"),
    (lambda d: d | {"version": 7}, "this rehear reads 'rehear-phone-costs' version 1"),
    (lambda d: d | {"phones": ["QQ", *d["phones"][1:]]}, "unknown QQ; missing AA"),
    (lambda d: d | {"deletion": d["deletion"][:5]}, "deletion: must be a list of 39 costs"),
    (lambda d: d | {"insertion": [1.5, *d["insertion"][1:]]}, "insertion[0] (AA): must lie in [0, 1], got 1.5"),
    (lambda d: d | {"substitution": d["substitution"][:-1]}, "substitution: must be 39 rows of 39 costs"),
    (lambda d: d | {"substitution": [[0.5, *d["substitution"][0][1:]], *d["substitution"][1:]]},
     "substitution[0][0]: AA heard as itself must cost 0, got 0.5"),
    (lambda d: d | {"substitution": [[0.0, "x", *d["substitution"][0][2:]], *d["substitution"][1:]]},
     "substitution[0] (AA said)[1] (AE): must be a number, got 'x'"),
])
def test_a_bad_file_is_refused_naming_the_file_and_the_problem(tmp_path: Path, change: Any, expected: str) -> None:
    path = tmp_path / "costs.json"
    changed = change(_hand_file())
    path.write_text(changed if isinstance(changed, str) else json.dumps(changed))
    with pytest.raises(ConfigError) as caught:
        read_costs(path)
    assert caught.value.title == f"Phone cost file {path} is invalid"
    assert any(line.startswith(f"{path}: ") and expected in line for line in caught.value.problems), \
        caught.value.problems


def test_a_missing_file_is_refused_naming_it(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match=r"nothing\.json: cannot be read"):
        read_costs(tmp_path / "nothing.json")


def test_the_stage_aligns_with_the_costs_the_setting_names(tmp_path: Path) -> None:
    # Hand costs: "gerf" (G ER F) differs from the entry "kerf" (`say` kurf, K ER F) in voicing
    # only (0.2), near enough to be corrected.
    assert [e.id for e in run(small_chain(tmp_path), "what is the gerf on this blade").entities] == ["term.kerf"]
    # A cost file (named relative to the configuration) in which every edit costs 1 puts them
    # further apart than the stage's floors allow; the stage must align with it.
    data = _hand_file()
    size = len(PHONES)
    data["substitution"] = [[0.0 if r == c else 1.0 for c in range(size)] for r in range(size)]
    data["deletion"] = data["insertion"] = [1.0] * size
    (tmp_path / "unit.json").write_text(json.dumps(data))
    chain = small_chain(tmp_path, match={"costs": "unit.json"})
    stage = chain.stages[-1]
    assert stage.files["phone costs"] == tmp_path / "unit.json"  # type: ignore[attr-defined]
    assert stage.costs == CostModel.unit()  # type: ignore[attr-defined]
    assert run(chain, "what is the gerf on this blade").entities == []


def test_check_names_a_missing_cost_file(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    (tmp_path / "lexicon.csv").write_text("id,type,name\nplace.bay_1,place,bay one\n")
    config = tmp_path / "relay.yaml"
    config.write_text("stages:\n  - normalize\n  - lexicon:\n      lexicon: lexicon.csv\n"
                      "      match: {costs: sounds.json}\n")
    assert main(["check", str(config), "--no-load"]) == 2
    assert f"phone costs file {tmp_path / 'sounds.json'} does not exist" in capsys.readouterr().err


def test_check_names_a_bad_cost_file_when_loading(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    (tmp_path / "lexicon.csv").write_text("id,type,name\nplace.bay_1,place,bay one\n")
    (tmp_path / "sounds.json").write_text('{"format": "rehear-phone-costs"}')
    config = tmp_path / "relay.yaml"
    config.write_text("stages:\n  - normalize\n  - lexicon:\n      lexicon: lexicon.csv\n"
                      "      match: {costs: sounds.json}\n")
    assert main(["check", str(config)]) == 2
    err = capsys.readouterr().err
    assert f"Phone cost file {tmp_path / 'sounds.json'} is invalid" in err and "missing key 'phones'" in err
    assert "Traceback" not in err

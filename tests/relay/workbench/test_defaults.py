"""The default chain names its files once, in domain:, and every stage that reads them gets them."""

from __future__ import annotations

import warnings
from pathlib import Path

from relay.core.config import build_chain
from relay.workbench.defaults import default_config
from relay.workbench.variants import config_from_dict
from stages.lm.kneser_ney import DiscountFallbackWarning


def test_lexicon_stage_gets_the_models_path_and_loads_it(tmp_path: Path) -> None:
    lexicon = tmp_path / "lexicon.csv"
    lexicon.write_text("id,type,name\nmachine.lathe,machine,lathe\nperson.mara_lind,person,mara lind\n")
    train = tmp_path / "train.txt"
    train.write_text("book the {machine} for {person}\nplease page {person}\nis the {machine} free\n")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DiscountFallbackWarning)  # a toy corpus has too few counts
        raw = default_config(lexicon=lexicon, train=train, speakers=None, cache_dir=tmp_path / "cache")
    assert raw["domain"]["text"] == str(train.resolve())
    model = Path(raw["domain"]["language_model"])
    chain = build_chain(config_from_dict(raw, base_dir=tmp_path))
    chain.load()
    by_name = dict(zip(chain.names, chain.stages))
    assert by_name["lm_rescore"].model_path == model  # type: ignore[attr-defined]
    assert by_name["lexicon"].lm is not None  # type: ignore[attr-defined]
    assert by_name["lexicon"].files["language model"] == model  # type: ignore[attr-defined]
    assert len(by_name["lexicon"].carrier.phrases) == 3  # type: ignore[attr-defined]
    assert by_name["gate"].files["carrier phrases"] == train.resolve()  # type: ignore[attr-defined]


def test_default_chain_carries_person_hints_and_slots(tmp_path: Path) -> None:
    lexicon = tmp_path / "lexicon.csv"
    lexicon.write_text("id,type,name\nperson.mara_lind,person,mara lind\n")
    raw = default_config(lexicon=lexicon, train=None, speakers=None, cache_dir=tmp_path / "cache")
    params = {name: p for item in raw["stages"] if isinstance(item, dict) for name, p in item.items()}
    assert "call" in params["lexicon"]["hints"]["person"]
    anchored = params["lexicon"]["anchored"]
    assert anchored["types"] == ["person", "machine"]
    assert "text" not in raw["domain"]  # no in-domain text, no carrier phrases
    assert anchored["floors"]["machine"] > anchored.get("min_phone", 0.68)  # stricter than persons'
    chain = build_chain(config_from_dict(raw, base_dir=tmp_path))
    chain.load()

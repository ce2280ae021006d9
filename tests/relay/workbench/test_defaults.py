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


def test_the_default_chain_reads_its_hints_off_the_in_domain_text(tmp_path: Path) -> None:
    # No word list of any one trade is built in: hints come from what stands before each slot.
    lexicon = tmp_path / "lexicon.csv"
    lexicon.write_text("id,type,name\nperson.mara_lind,person,mara lind\nvessel.tern,vessel,tern\n")
    train = tmp_path / "train.txt"
    train.write_text("hail {person} on channel two\nhail {person} now\nlift {vessel} out\nlift {vessel} at noon\n"
                     "please hail {person}\n")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DiscountFallbackWarning)  # a toy corpus has too few counts
        raw = default_config(lexicon=lexicon, train=train, speakers=None, cache_dir=tmp_path / "cache")
    assert "lexicon" in raw["stages"]  # no settings of its own
    chain = build_chain(config_from_dict(raw, base_dir=tmp_path))
    chain.load()
    stage = dict(zip(chain.names, chain.stages))["lexicon"]
    assert stage.learned["hints"] == {"person": ["hail"], "vessel": ["lift"]}  # type: ignore[attr-defined]
    without_text = default_config(lexicon=lexicon, train=None, speakers=None, cache_dir=tmp_path / "cache")
    chain = build_chain(config_from_dict(without_text, base_dir=tmp_path))
    chain.load()
    assert dict(zip(chain.names, chain.stages))["lexicon"].learned["hints"] == {}  # type: ignore[attr-defined]

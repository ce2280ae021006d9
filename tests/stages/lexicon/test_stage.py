"""The lexicon stage end to end on small invented lexicons."""

from __future__ import annotations

from pathlib import Path

import pytest

from relay.core.chain import Chain
from relay.core.errors import StageError
from relay.core.stage import StageContext
from relay.core.utterance import Hypothesis, Utterance
from stages.lexicon.settings import LexiconSettings
from stages.lexicon.sound.g2p import default_model
from stages.lexicon.stage import LexiconStage
from stages.normalize.stage import NormalizeSettings, NormalizeStage
from tests.stages.lexicon.fixtures import SMALL_LEXICON, run, small_chain


def test_misheard_name_is_corrected_with_spans_in_the_final_text(tmp_path: Path) -> None:
    utt = run(small_chain(tmp_path), "book the pillow table saw for me")
    assert utt.text == "book the pellow table saw for me"
    assert utt.chosen_text == utt.text
    [entity] = utt.entities
    assert entity.id == "machine.pellow_saw"
    assert utt.text[entity.span[0]:entity.span[1]] == "pellow table saw"
    assert entity.heard == "pillow table saw"
    assert 0.0 < entity.score <= 1.0
    [correction] = utt.corrections
    assert (correction.stage, correction.before, correction.after) == ("lexicon", "pillow table saw", "pellow table saw")
    assert utt.trace[-1].scores["candidates"][0]["id"] == "machine.pellow_saw"


def test_split_word_matches_one_entry_word(tmp_path: Path) -> None:
    utt = run(small_chain(tmp_path), "what is the curf on the quill an router")
    ids = {e.id for e in utt.entities}
    assert ids == {"term.kerf", "machine.quillan_router"}
    assert "quillan router" in utt.text


def test_unrelated_text_is_left_alone(tmp_path: Path) -> None:
    utt = run(small_chain(tmp_path), "the weather is nice today and the coffee is hot")
    assert utt.entities == [] and utt.corrections == [] and utt.chosen_text is None


def test_compiled_lexicon_is_cached_and_rebuilt_on_change(tmp_path: Path) -> None:
    small_chain(tmp_path)
    context = StageContext(base_dir=tmp_path, cache_dir=tmp_path / "cache")
    again = LexiconStage(LexiconSettings(lexicon=Path("lexicon.csv")), context=context)
    default_model.cache_clear()
    again.load()
    assert again.loaded_from_cache
    # Even from the cache the G2P model is loaded with the stage, not in the middle of a message.
    assert default_model.cache_info().currsize == 1
    (tmp_path / "lexicon.csv").write_text(SMALL_LEXICON + "term.tenon,term,tenon,,TEN-un,1.0\n")
    changed = LexiconStage(LexiconSettings(lexicon=Path("lexicon.csv")), context=context)
    changed.load()
    assert not changed.loaded_from_cache
    assert "term.tenon" in {e.id for e in changed._lexicon.entries}


def test_settings_forbid_unknown_keys() -> None:
    with pytest.raises(ValueError, match="extra"):
        LexiconSettings(lexicon=Path("x.csv"), bogus=1)  # type: ignore[call-arg]


def test_process_before_load_is_a_stage_error(tmp_path: Path) -> None:
    (tmp_path / "lexicon.csv").write_text(SMALL_LEXICON)
    stage = LexiconStage(LexiconSettings(lexicon=Path("lexicon.csv")),
                         context=StageContext(base_dir=tmp_path, cache_dir=tmp_path / "cache"))
    with pytest.raises(StageError, match="before load"):
        stage.process(Utterance("u1", "test", None, {}, [Hypothesis("kerf", 0, {})]))


def test_registry_finds_the_stage() -> None:
    from relay.core.registry import Registry

    assert Registry(plugins=False).get("lexicon") is LexiconStage


def test_empty_and_unknown_input_is_harmless(tmp_path: Path) -> None:
    chain = small_chain(tmp_path, speakers="speaker,id,affinity\nm1,term.kerf,0.5\n")
    utt = run(chain, "", "uh", speaker="nobody-known")
    assert utt.entities == [] and utt.corrections == []
    assert run(chain, "zzxq vrrk").entities == []


def test_yaml_lexicon_loads_through_the_stage(tmp_path: Path) -> None:
    (tmp_path / "lex.yaml").write_text("- {id: term.kerf, type: term, name: kerf, say: kurf}\n")
    context = StageContext(base_dir=tmp_path, cache_dir=tmp_path / "cache")
    chain = Chain([NormalizeStage(NormalizeSettings(), context=context),
                   LexiconStage(LexiconSettings(lexicon=Path("lex.yaml")), context=context)])
    chain.load()
    utt = run(chain, "what is the curf on this blade")
    assert [e.id for e in utt.entities] == ["term.kerf"]

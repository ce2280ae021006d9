"""The lexicon stage end to end on small invented lexicons."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pytest

from relay.core.chain import Chain
from relay.core.stage import StageContext
from relay.core.utterance import Hypothesis, Utterance
from stages.lexicon.settings import LexiconSettings
from stages.lexicon.sound.g2p import default_model
from stages.lexicon.stage import LexiconStage
from stages.normalize.stage import NormalizeSettings, NormalizeStage

LEXICON = """id,type,name,aliases,say,weight
machine.pellow_saw,machine,pellow table saw,pellow,,1.0
machine.quillan_router,machine,quillan router,quillan,KWIL-an router,1.0
person.tamsin_okoro,person,tamsin okoro,tamsin,,1.0
person.tamsin_okara,person,tamsin okara,,,1.0
term.kerf,term,kerf,,kurf,1.0
place.bay_2,place,bay two,,,1.0
"""


def make_chain(tmp_path: Path, lexicon: str = LEXICON, speakers: str | None = None, **settings: Any) -> Chain:
    (tmp_path / "lexicon.csv").write_text(lexicon)
    params: dict[str, Any] = {"lexicon": "lexicon.csv"} | settings
    if speakers is not None:
        (tmp_path / "speakers.csv").write_text(speakers)
        params["speakers"] = "speakers.csv"
    context = StageContext(base_dir=tmp_path, cache_dir=tmp_path / "cache")
    chain = Chain([NormalizeStage(NormalizeSettings(), context=context),
                   LexiconStage(LexiconSettings(**params), context=context)])
    chain.load()
    return chain


def run(chain: Chain, *texts: str, speaker: str | None = None, conf: list[float] | None = None) -> Utterance:
    conf = conf or [1.0 / len(texts)] * len(texts)
    nbest = [Hypothesis(t, r, {"conf": c}) for r, (t, c) in enumerate(zip(texts, conf))]
    return chain.process(Utterance("u1", "test", speaker, {}, nbest))


def blocked(utt: Utterance) -> list[dict[str, Any]]:
    return list(utt.trace[-1].scores["blocked"])


def test_misheard_name_is_corrected_with_spans_in_the_final_text(tmp_path: Path) -> None:
    utt = run(make_chain(tmp_path), "book the pillow table saw for me")
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
    utt = run(make_chain(tmp_path), "what is the curf on the quill an router")
    ids = {e.id for e in utt.entities}
    assert ids == {"term.kerf", "machine.quillan_router"}
    assert "quillan router" in utt.text


def test_exact_text_is_kept_without_correction(tmp_path: Path) -> None:
    utt = run(make_chain(tmp_path), "tamsin okara is in bay two")
    assert utt.chosen_text is None and utt.corrections == []
    assert {e.id for e in utt.entities} == {"person.tamsin_okara", "place.bay_2"}
    assert any(b["guard"] == "exact_text_kept" and b["id"] == "person.tamsin_okoro" for b in blocked(utt))


def test_common_words_need_stronger_evidence(tmp_path: Path) -> None:
    # "pillow" sits just under the default Zipf 4.0 line; lower it so the whole span is common.
    chain = make_chain(tmp_path, general={"common_min_score": 0.99, "common_zipf": 3.5, "common_relief": 0.0})
    utt = run(chain, "book the pillow table saw for me")
    assert utt.corrections == []
    assert any(b["guard"] == "common_words" for b in blocked(utt))
    # Longer runs of common words get some relief: three words need 2 x 0.02 less.
    eased = run(make_chain(tmp_path, general={"common_min_score": 0.99, "common_zipf": 3.5, "common_relief": 0.02}),
                "book the pillow table saw for me")
    assert [c.after for c in eased.corrections] == ["pellow table saw"]


def test_margin_over_the_runner_up_is_required(tmp_path: Path) -> None:
    # "tamsin okorra" is equally far from okoro and okara: neither may win.
    utt = run(make_chain(tmp_path, general={"margin": 0.2}), "call tamsin okorra now")
    assert utt.corrections == []
    assert any(b["guard"] == "margin" for b in blocked(utt))


def test_entity_supported_across_the_nbest_beats_a_one_off(tmp_path: Path) -> None:
    # okoro and okara sound alike, so the default margin would (rightly) refuse both; lower it.
    chain = make_chain(tmp_path, general={"margin": 0.02})
    # The first hypothesis alone leans to okara, the rest of the list says okoro.
    utt = run(chain, "call tamsin akara", "call tamsin okoro", "call tamsin okoro please",
              conf=[0.4, 0.3, 0.3])
    assert utt.trace[-1].scores["candidates"][0]["id"] == "person.tamsin_okoro"
    assert [e.id for e in utt.entities] == ["person.tamsin_okoro"]
    # The first hypothesis on its own would have chosen okara.
    alone = run(chain, "call tamsin akara")
    assert alone.trace[-1].scores["candidates"][0]["id"] == "person.tamsin_okara"


def test_entity_only_in_a_deeper_hypothesis_can_win(tmp_path: Path) -> None:
    utt = run(make_chain(tmp_path), "book the table for me", "book the pellow table saw for me",
              "book the pellow table saw for me please", conf=[0.4, 0.35, 0.25])
    assert [e.id for e in utt.entities] == ["machine.pellow_saw"]
    assert "pellow table saw" in utt.text


def test_speaker_affinity_breaks_a_tie(tmp_path: Path) -> None:
    speakers = "speaker,id,affinity\nmember-1,person.tamsin_okara,1.0\n"
    chain = make_chain(tmp_path, speakers=speakers, general={"margin": 0.1}, priors={"affinity_weight": 0.3})
    without = run(chain, "call tamsin okorra now")
    with_prior = run(chain, "call tamsin okorra now", speaker="member-1")
    assert "person.tamsin_okara" not in {e.id for e in without.entities}
    assert [e.id for e in with_prior.entities] == ["person.tamsin_okara"]


def test_type_hint_demands_more_evidence_without_its_word(tmp_path: Path) -> None:
    hints = {"person": ["call", "ask"]}
    chain = make_chain(tmp_path, hints=hints, general={"hint_penalty": 0.5})
    hinted = run(chain, "call tamzin okoroh")
    unhinted = run(chain, "the tamzin okoroh")
    assert "person.tamsin_okoro" in {e.id for e in hinted.entities}
    assert "person.tamsin_okoro" not in {e.id for e in unhinted.entities}
    assert any(b["guard"] == "type_hint" for b in blocked(unhinted))
    # The hint word also adds hint_bonus to the entry's score.
    def top(utt: Utterance) -> float:
        return float(next(c["score"] for c in utt.trace[-1].scores["candidates"] if c["id"] == "person.tamsin_okoro"))

    assert top(hinted) - top(unhinted) == pytest.approx(0.1, abs=1e-3)


def test_unrelated_text_is_left_alone(tmp_path: Path) -> None:
    utt = run(make_chain(tmp_path), "the weather is nice today and the coffee is hot")
    assert utt.entities == [] and utt.corrections == [] and utt.chosen_text is None


def test_compiled_lexicon_is_cached_and_rebuilt_on_change(tmp_path: Path) -> None:
    make_chain(tmp_path)
    context = StageContext(base_dir=tmp_path, cache_dir=tmp_path / "cache")
    again = LexiconStage(LexiconSettings(lexicon=Path("lexicon.csv")), context=context)
    default_model.cache_clear()
    again.load()
    assert again.loaded_from_cache
    # Even from the cache the G2P model is loaded with the stage, not in the middle of a message.
    assert default_model.cache_info().currsize == 1
    (tmp_path / "lexicon.csv").write_text(LEXICON + "term.tenon,term,tenon,,TEN-un,1.0\n")
    changed = LexiconStage(LexiconSettings(lexicon=Path("lexicon.csv")), context=context)
    changed.load()
    assert not changed.loaded_from_cache
    assert "term.tenon" in {e.id for e in changed._lexicon.entries}


def test_settings_forbid_unknown_keys() -> None:
    with pytest.raises(ValueError, match="extra"):
        LexiconSettings(lexicon=Path("x.csv"), bogus=1)  # type: ignore[call-arg]


def test_registry_finds_the_stage() -> None:
    from relay.core.registry import Registry

    assert Registry(plugins=False).get("lexicon") is LexiconStage


def test_empty_and_unknown_input_is_harmless(tmp_path: Path) -> None:
    chain = make_chain(tmp_path, speakers="speaker,id,affinity\nm1,term.kerf,0.5\n")
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

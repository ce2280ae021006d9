from __future__ import annotations

import logging
import math
from pathlib import Path

import pytest
from pydantic import ValidationError

from relay.core.config import build_chain, load_config
from relay.core.domain import Domain
from relay.core.errors import ConfigError
from relay.core.registry import Registry
from relay.core.stage import StageContext
from relay.core.utterance import Correction, Entity, Hypothesis, TraceEntry, Utterance
from relay.live.messages import parse_message
from stages.gate.features import ASR_LOG_FLOOR, GateFeatures, backing
from stages.gate.rules import decide
from stages.gate.settings import GateSettings, default_confidence
from stages.gate.stage import GateStage
from tests.paths import DATA

CONTEXT = StageContext(base_dir=Path("."), cache_dir=Path(".rehear-cache"))


def make_utterance(posteriors: list[float], texts: list[str] | None = None, *,
                   entities: list[Entity] | None = None, corrections: list[Correction] | None = None,
                   lm_per_word: float | None = None) -> Utterance:
    texts = texts or [f"hypothesis {i}" for i in range(len(posteriors))]
    nbest = [Hypothesis(text=t, rank=i, fields={"text": t}, tokens=t.split(), posterior=p)
             for i, (t, p) in enumerate(zip(texts, posteriors))]
    if lm_per_word is not None:
        nbest[0].scores["lm_per_word"] = lm_per_word
    utterance = Utterance(id="u1", source="test", speaker=None, payload={}, nbest=nbest,
                          entities=entities or [], corrections=corrections or [])
    utterance.trace.append(TraceEntry("gate"))
    return utterance


def machine(score: float, name: str = "corvin bandsaw") -> Entity:
    return Entity(id="machine.x", type="machine", name=name, span=(0, len(name)), heard="carving band saw", score=score)


# The hand thresholds these tests exercise (the gate's defaults before the shipped confidence),
# with no learned confidence unless a test gives one.
HAND: dict[str, object] = {"accept_posterior": 0.6, "accept_margin": 0.2, "accept_entity": 0.5,
                           "accept_correction": 0.8, "reprompt_posterior": 0.2, "reprompt_entity": 0.2,
                           "confidence": None, "accept_confidence": 0.5, "reprompt_confidence": 0.15}


def gate(**settings: object) -> GateStage:
    return GateStage(GateSettings.model_validate(HAND | settings), context=CONTEXT)


def test_confident_result_with_strong_entity_is_accepted() -> None:
    utterance = gate().process(make_utterance([0.9, 0.1], ["book the corvin bandsaw", "book the"],
                                              entities=[machine(0.95)]))
    assert utterance.decision == "accept"
    assert utterance.prompt is None
    assert utterance.trace[-1].scores["rule"] == "scores"


def test_low_posterior_asks_again_naming_the_entity_type() -> None:
    utterance = gate().process(make_utterance([0.15, 0.1, 0.1], entities=[machine(0.9)]))
    assert utterance.decision == "reprompt"
    assert utterance.trace[-1].scores["rule"] == "low_posterior"


def test_weak_entity_asks_which_one() -> None:
    utterance = gate().process(make_utterance([0.9, 0.1], entities=[machine(0.1)]))
    assert utterance.decision == "reprompt"
    assert utterance.prompt == "Which machine?"


def test_type_nouns_and_per_type_prompts_apply() -> None:
    stage = gate(type_nouns={"machine": "tool"}, prompts_by_type={"person": {"reprompt_entity": "Who do you mean?"}})
    assert stage.process(make_utterance([0.9, 0.1], entities=[machine(0.1)])).prompt == "Which tool?"
    person = Entity(id="p", type="person", name="ane szymanska", span=(0, 3), heard="anne", score=0.1)
    assert stage.process(make_utterance([0.9, 0.1], entities=[person])).prompt == "Who do you mean?"


def test_a_doubt_with_no_entity_to_ask_about_asks_again_instead_of_reading_the_text_back() -> None:
    stage = gate(accept_posterior=0.5, accept_margin=0.3)
    utterance = stage.process(make_utterance([0.62, 0.38], ["book the lathe", "look the lathe"]))
    assert utterance.decision == "reprompt"
    assert utterance.prompt == "Sorry, could you say that again?"
    assert utterance.trace[-1].scores["rule"] == "margin"
    assert utterance.trace[-1].scores["margin"] == pytest.approx(0.24)


def test_uncertain_correction_is_confirmed_naming_the_corrected_entity() -> None:
    fix = Correction(stage="lexicon", before="pillow table saw", after="pellow table saw", score=0.7, reason="phonetic")
    utterance = gate().process(make_utterance(
        [0.95, 0.05], ["book the pellow table saw", "x"], entities=[machine(0.9, "pellow table saw")], corrections=[fix]))
    assert utterance.decision == "confirm"
    assert utterance.prompt == "Did you mean pellow table saw?"
    assert utterance.trace[-1].scores["corrected"] is True


def test_confident_correction_is_accepted() -> None:
    fix = Correction(stage="lexicon", before="pillow", after="pellow table saw", score=0.95, reason="phonetic")
    utterance = gate().process(make_utterance([0.95, 0.05], entities=[machine(0.9)], corrections=[fix]))
    assert utterance.decision == "accept"


@pytest.mark.parametrize("text,rule", [
    ("start the corvin bandsaw", "safety:word:start"),
    ("please spin up the lathe", "safety:word:spin up"),
    ("Open valve 3", "safety:word:open"),
])
def test_dangerous_commands_are_always_confirmed(text: str, rule: str) -> None:
    utterance = gate().process(make_utterance([0.99, 0.01], [text, "x"], entities=[machine(0.99)]))
    assert utterance.decision == "confirm"
    assert utterance.trace[-1].scores["rule"] == rule
    assert utterance.prompt == f"Please confirm: {utterance.text}?"


def test_a_likely_runner_up_with_a_dangerous_word_is_confirmed() -> None:
    texts = ["stat the lathe", "start the lathe"]
    utterance = gate().process(make_utterance([0.85, 0.15], texts))
    assert utterance.decision == "confirm"
    assert utterance.trace[-1].scores["rule"] == "safety:word:start (runner-up)"
    assert gate(safety_min_posterior=0.2).process(make_utterance([0.85, 0.15], texts)).decision == "accept"


def test_words_match_whole_words_only() -> None:
    utterance = gate().process(make_utterance([0.99, 0.01], ["the starter kit is in bay two", "x"]))
    assert utterance.decision == "accept"


def test_dangerous_entity_type_is_confirmed() -> None:
    valve = Entity(id="v1", type="valve", name="coolant valve", span=(0, 5), heard="coolant valve", score=0.99)
    utterance = gate(safety_words=[]).process(make_utterance([0.99, 0.01], ["check the coolant valve", "x"],
                                                             entities=[valve]))
    assert utterance.decision == "confirm"
    assert utterance.trace[-1].scores["rule"] == "safety:type:valve"


def test_safety_rule_never_relaxes_a_reprompt() -> None:
    utterance = gate().process(make_utterance([0.1, 0.1], ["start it", "stop it"]))
    assert utterance.decision == "reprompt"


def test_low_language_model_score_confirms_when_configured() -> None:
    assert gate().process(make_utterance([0.9, 0.1], lm_per_word=-9.0)).decision == "accept"
    utterance = gate(min_lm_per_word=-6.0).process(make_utterance([0.9, 0.1], lm_per_word=-9.0))
    assert utterance.decision == "reprompt"  # in doubt, and no entity to ask about
    assert utterance.trace[-1].scores["rule"] == "lm_per_word"
    assert utterance.trace[-1].scores["lm_per_word"] == -9.0


def test_result_without_entity_can_be_sent_back() -> None:
    utterance = gate(accept_without_entity=False).process(make_utterance([0.9, 0.1]))
    assert (utterance.decision, utterance.trace[-1].scores["rule"]) == ("reprompt", "no_entity")


def test_empty_text_asks_again() -> None:
    assert gate().process(make_utterance([1.0], [""])).decision == "reprompt"


def test_decide_is_a_pure_function_of_features() -> None:
    features = GateFeatures(posterior=0.7, margin=0.5, weakest_entity=0.55, corrected=False,
                            correction_score=None, lm_per_word=None, safety_rule=None, empty=False)
    assert decide(features, GateSettings.model_validate(HAND)) == ("accept", "scores")
    assert decide(features, GateSettings.model_validate(HAND | {"accept_entity": 0.6})) == ("confirm", "entity")


@pytest.mark.parametrize("settings,message", [
    ({"accept_posterior": 0.3, "reprompt_posterior": 0.5}, "reprompt_posterior"),
    ({"prompts": {"confirm": "Did you mean {txt}?"}}, "unknown placeholder {txt}"),
    ({"acept_posterior": 0.5}, "Extra inputs are not permitted"),
])
def test_invalid_settings_are_rejected(settings: dict[str, object], message: str) -> None:
    with pytest.raises(ValidationError, match=message.replace("{", r"\{").replace("}", r"\}")):
        GateSettings.model_validate(settings)


def test_gate_runs_in_a_chain_built_from_yaml(tmp_path: Path) -> None:
    config = tmp_path / "relay.yaml"
    config.write_text("stages:\n  - normalize\n  - gate:\n      accept_posterior: 0.7\n      confidence: null\n")
    chain = build_chain(load_config(config))
    assert Registry().get("gate") is GateStage
    chain.load()
    message = b'{"id": "a", "nbest": [{"text": "Book the lathe", "conf": 0.9}, {"text": "look the lathe", "conf": 0.1}]}'
    utterance = chain.process(parse_message(message, topic="asr/a/nbest"))
    assert utterance.decision == "accept"
    assert utterance.trace[-1].stage == "gate"
    assert utterance.trace[-1].scores["posterior"] == pytest.approx(0.9)


# --- learned confidence -------------------------------------------------------------------



def _oov_model(**extra: object) -> dict[str, object]:
    """A confidence that falls with each word the LM has never seen (weights written by hand)."""
    return {"lm_model": str(DATA / "lm_domain.o3.arpa"), "accept_confidence": 0.6, "reprompt_confidence": 0.2,
            "confidence": {"bias": 2.0, "features": {"text_oov": {"weight": -1.5, "center": 0.0, "scale": 1.0}}},
            "safety_words": [], **extra}


def test_the_gate_scores_the_finished_text_with_its_language_model() -> None:
    import kenlm

    stage = gate(**_oov_model())
    stage.load()
    text = "book the quux"
    features = stage.features(make_utterance([0.9, 0.1], [text, "other"]))
    # Reference: kenlm's own per-word scores of the same sentence (log10, turned into natural log).
    config = kenlm.Config()
    config.show_progress = False
    scores = list(kenlm.Model(str(DATA / "lm_domain.o3.arpa"), config).full_scores(text, bos=True, eos=True))
    assert features.text_lm_per_word == pytest.approx(sum(s[0] for s in scores) * math.log(10) / 4)
    assert features.text_lm_weakest == pytest.approx(min(s[0] for s in scores[:3]) * math.log(10))
    assert features.text_oov == sum(s[2] for s in scores[:3]) == 1
    assert features.words == 3


def test_confidence_accepts_confirms_or_asks_again() -> None:
    stage = gate(**_oov_model(accept_posterior=0.0, accept_entity=0.0, accept_correction=0.0,
                              reprompt_posterior=0.0, reprompt_entity=0.0))
    stage.load()
    # sigmoid(2) = 0.88 with no unknown word, sigmoid(0.5) = 0.62 with one, sigmoid(-1) = 0.27, sigmoid(-2.5) = 0.08.
    for text, decision, rule in (("book the lathe", "accept", "scores"), ("book the quux", "accept", "scores"),
                                 ("quux the quuz", "reprompt", "confidence"),  # no entity to confirm
                                 ("quux quuz quuv", "reprompt", "low_confidence")):
        utterance = stage.process(make_utterance([0.9, 0.1], [text, "other"]))
        assert (utterance.decision, utterance.trace[-1].scores["rule"]) == (decision, rule), text


def test_the_more_cautious_of_thresholds_and_confidence_wins() -> None:
    stage = gate(**_oov_model(accept_posterior=0.95))
    stage.load()
    # Confident by the model, but the posterior threshold asks: thresholds still apply.
    utterance = stage.process(make_utterance([0.9, 0.1], ["book the lathe", "other"]))
    assert utterance.decision == "reprompt"  # confirm, but no entity to confirm: asked again
    assert utterance.trace[-1].scores["rule"] == "posterior"
    # And the safety rule is above both.
    stage = gate(**_oov_model(accept_posterior=0.0, accept_entity=0.0, accept_correction=0.0,
                              reprompt_posterior=0.0, reprompt_entity=0.0, safety_words=["book"]))
    stage.load()
    assert stage.process(make_utterance([0.9, 0.1], ["book the lathe", "other"])).decision == "confirm"


def test_text_features_need_a_language_model() -> None:
    settings = _oov_model()
    del settings["lm_model"]
    with pytest.raises(ConfigError, match="confidence uses text_oov") as caught:
        gate(**settings)
    assert "which need domain.language_model (or lm_model)" in str(caught.value)
    # Given by the configuration's domain: section instead, the same settings load.
    domain = StageContext(base_dir=CONTEXT.base_dir, cache_dir=CONTEXT.cache_dir,
                          domain=Domain(language_model=DATA / "lm_domain.o3.arpa"))
    assert GateStage(GateSettings.model_validate(settings), context=domain).lm_path == DATA / "lm_domain.o3.arpa"
    with pytest.raises(ValidationError, match="reprompt_confidence must not exceed"):
        GateSettings.model_validate(_oov_model(reprompt_confidence=0.7))


def test_an_unsure_correction_is_confirmed_by_naming_the_corrected_entity() -> None:
    stage = gate(**_oov_model(accept_posterior=0.0, accept_entity=0.0, accept_correction=0.0,
                              reprompt_posterior=0.0, reprompt_entity=0.0))
    stage.load()
    fix = Correction(stage="lexicon", before="lay the", after="lathe", score=0.9, reason="phonetic")
    # Two unknown words: sigmoid(2 - 3) = 0.27, between the reprompt and accept thresholds.
    utterance = stage.process(make_utterance([0.9, 0.1], ["quux quuz lathe", "other"],
                                             entities=[machine(0.9, name="lathe")], corrections=[fix]))
    assert (utterance.decision, utterance.trace[-1].scores["rule"]) == ("confirm", "confidence")
    assert utterance.prompt == "Did you mean lathe?"


def _carrier_gate(tmp_path: Path, feature: str = "unfilled_slots") -> GateStage:
    """A gate over two in-domain lines whose confidence is sigmoid(2 - 4 x ``feature``)."""
    (tmp_path / "train.txt").write_text("meet me in {place}\nbook the {machine} for {person}\n")
    stage = gate(carrier_text=str(tmp_path / "train.txt"), accept_confidence=0.6, reprompt_confidence=0.2,
                 confidence={"bias": 2.0, "features": {feature: {"weight": -4.0, "center": 0.0, "scale": 1.0}}},
                 type_nouns={"place": "room"}, safety_words=[])
    stage.load()
    return stage


def test_a_slot_no_entity_fills_is_a_feature_and_asks_for_that_type(tmp_path: Path) -> None:
    stage = _carrier_gate(tmp_path)
    missed = stage.process(make_utterance([0.9, 0.1], ["meet me in they won", "meet me in day one"]))
    assert missed.trace[-1].scores["unfilled_slots"] == 1
    assert missed.trace[-1].scores["unfilled_type"] == "place"
    # sigmoid(2 - 4) = 0.12, below reprompt_confidence: ask for the room, not for the whole sentence.
    assert (missed.decision, missed.prompt) == ("reprompt", "Which room?")
    bay = Entity(id="place.bay_1", type="place", name="bay one", span=(11, 18), heard="they won", score=0.9)
    found = stage.process(make_utterance([0.9, 0.1], ["meet me in bay one", "other"], entities=[bay]))
    assert found.trace[-1].scores["unfilled_slots"] == 0
    assert found.decision == "accept"
    other = stage.process(make_utterance([0.9, 0.1], ["what time is it", "other"]))
    assert (other.trace[-1].scores["unfilled_slots"], other.decision) == (0, "accept")


def test_line_edits_counts_words_away_from_the_nearest_in_domain_line(tmp_path: Path) -> None:
    stage = _carrier_gate(tmp_path)
    bay = Entity(id="place.bay_1", type="place", name="bay one", span=(11, 18), heard="they won", score=0.9)
    assert stage.features(make_utterance([0.9, 0.1], ["meet me in bay one", "x"], entities=[bay])).line_edits == 0
    # "meet me in they won": the slot's two plain words against one marker, a substitution and an insertion.
    assert stage.features(make_utterance([0.9, 0.1], ["meet me in they won", "x"])).line_edits == 2
    assert stage.features(make_utterance([0.9, 0.1], ["please meet me in bay one", "x"],
                                         entities=[Entity(id="place.bay_1", type="place", name="bay one",
                                                          span=(18, 25), heard="bay one", score=1.0)])).line_edits == 1
    far = stage.features(make_utterance([0.9, 0.1], ["what time is it", "x"]))
    assert far.line_edits == 4 and far.values()["line_edits"] == 4.0


def test_line_edit_relative_reads_the_edit_share_against_the_lines_own(tmp_path: Path) -> None:
    stage = _carrier_gate(tmp_path, "line_edit_relative")
    # The two lines "meet me in {place}" and "book the {machine} for {person}" share no word: 5
    # edits apart (4 substitutions and an insertion), 5 per 4 words and 5 per 5, so their own
    # share is (1.25 + 1) / 2.
    assert stage.lines_own_share == pytest.approx(1.125)
    values = stage.features(make_utterance([0.9, 0.1], ["meet me in they won", "x"])).values()
    assert values["line_edit_share"] == pytest.approx(2 / 5)
    assert values["line_edit_relative"] == pytest.approx(2 / 5 - 1.125)
    assert gate().features(make_utterance([0.9, 0.1], ["meet me in they won", "x"])).values()["line_edit_relative"] is None


def test_missing_slot_odds_weighs_a_missing_slot_by_how_rarely_a_line_names_nothing(tmp_path: Path) -> None:
    stage = _carrier_gate(tmp_path, "missing_slot_odds")
    # Both lines name an entity: by the rule of succession an entity-free request has (0 + 1) / (2 + 2)
    # = 1/4, so a missing slot counts the log-odds against one, ln 3.
    assert stage.missing_odds == pytest.approx(math.log(3))
    missed = stage.features(make_utterance([0.9, 0.1], ["meet me in they won", "x"]))
    assert missed.missing_slots == 1 and missed.values()["missing_slot_odds"] == pytest.approx(math.log(3))
    (tmp_path / "more.txt").write_text("meet me in {place}\nopen the door\nclose the door\nis it raining\n")
    many = gate(carrier_text=str(tmp_path / "more.txt"), safety_words=[])
    many.load()
    # Three of four lines name nothing: (3 + 1) / (4 + 2) = 2/3, and a missing slot counts ln 1/2.
    assert many.features(make_utterance([0.9, 0.1], ["meet me in they won", "x"])).missing_slot_odds == pytest.approx(
        math.log(0.5))
    assert gate().features(make_utterance([0.9, 0.1], ["meet me in they won", "x"])).missing_slot_odds is None


def test_text_oov_relative_takes_off_the_unknown_words_the_lines_lead_one_to_expect(tmp_path: Path) -> None:
    (tmp_path / "train.txt").write_text("open the door\nclose the gate\n")
    stage = gate(carrier_text=str(tmp_path / "train.txt"), lm_model=str(DATA / "lm_domain.o3.arpa"), safety_words=[])
    stage.load()
    # Of the lines' 6 words, 4 occur once ("the" twice): Good-Turing's unseen share N1 / N is 2/3,
    # so four words of in-domain text are expected to hold 8/3 the lines never saw.
    assert stage.unseen == pytest.approx(2 / 3)
    features = stage.features(make_utterance([0.9, 0.1], ["quux quuz the lathe", "x"]))
    assert features.text_oov == 2 and features.text_oov_relative == pytest.approx(2 - 2 / 3 * 4)
    assert gate(lm_model=str(DATA / "lm_domain.o3.arpa")).features(
        make_utterance([0.9, 0.1], ["quux quuz lathe", "x"])).text_oov_relative is None


def test_missing_slots_counts_slots_of_the_nearest_line_no_entity_fills(tmp_path: Path) -> None:
    stage = _carrier_gate(tmp_path)
    bay = Entity(id="place.bay_1", type="place", name="bay one", span=(11, 18), heard="they won", score=0.9)
    found = stage.features(make_utterance([0.9, 0.1], ["meet me in bay one", "x"], entities=[bay]))
    assert found.missing_slots == 0 and found.values()["missing_slots"] == 0.0
    # The place was not found: the nearest line ("meet me in {place}") holds a slot the result does not.
    assert stage.features(make_utterance([0.9, 0.1], ["meet me in they won", "x"])).missing_slots == 1


def test_a_missing_slot_lowers_confidence_and_the_reprompt_asks_for_its_type(tmp_path: Path) -> None:
    stage = _carrier_gate(tmp_path, "missing_slots")
    # "meet in there": no carrier phrase matches word for word, but the nearest line, two edits
    # away, holds a place the result has no entity for: sigmoid(2 - 4) = 0.12, below 0.2.
    missed = stage.process(make_utterance([0.9, 0.1], ["meet in there", "meat in there"]))
    assert missed.trace[-1].scores["unfilled_slots"] == 0
    assert (missed.decision, missed.prompt) == ("reprompt", "Which room?")
    bay = Entity(id="place.bay_1", type="place", name="bay one", span=(8, 15), heard="bay one", score=1.0)
    found = stage.process(make_utterance([0.9, 0.1], ["meet in bay one", "x"], entities=[bay]))
    assert found.decision == "accept"


def test_an_entity_the_nearest_line_has_no_slot_for_lowers_confidence(tmp_path: Path) -> None:
    stage = _carrier_gate(tmp_path, "foreign_slots")
    # "meet me in {person}": a person where the in-domain text only ever puts a place. The nearest
    # line is one substitution away and holds no person slot: sigmoid(2 - 4) = 0.12.
    person = Entity(id="person.x", type="person", name="bea juan", span=(11, 19), heard="bay one", score=0.9)
    foreign = stage.process(make_utterance([0.9, 0.1], ["meet me in bea juan", "x"], entities=[person]))
    assert foreign.trace[-1].scores["foreign_slots"] == 1 and foreign.decision == "reprompt"
    bay = Entity(id="place.bay_1", type="place", name="bay one", span=(11, 18), heard="bay one", score=0.9)
    found = stage.process(make_utterance([0.9, 0.1], ["meet me in bay one", "x"], entities=[bay]))
    assert found.trace[-1].scores["foreign_slots"] == 0 and found.decision == "accept"


def test_without_carrier_text_the_feature_is_unknown() -> None:
    features = gate().features(make_utterance([0.9, 0.1], ["meet me in they won", "x"]))
    assert features.unfilled_slots is None and features.values()["unfilled_slots"] is None
    assert features.line_edits is None and features.values()["line_edits"] is None
    assert features.missing_slots is None and features.values()["missing_slots"] is None
    assert features.foreign_slots is None and features.values()["foreign_slots"] is None


def test_unfilled_slots_needs_carrier_text() -> None:
    for feature in ("unfilled_slots", "line_edits", "line_edit_share", "line_edit_relative", "missing_slots",
                    "foreign_slots", "missing_slot_odds"):
        with pytest.raises(ConfigError, match=f"confidence uses {feature}") as caught:
            gate(confidence={"features": {feature: {"weight": -1.0}}})
        assert "which need domain.text (or carrier_text)" in str(caught.value)
    # A carrier lexicon without carrier phrases is not read at all.
    assert gate(carrier_lexicon="lexicon.csv").lexicon_path is None


def test_a_safety_word_inside_an_entity_name_is_part_of_the_name() -> None:
    text = "the heron lift is making a grinding noise"
    lift = Entity(id="machine.heron_lift", type="machine", name="heron lift", span=(4, 14), heard="heron lift",
                  score=0.95)
    # The runner-up holds the name too: it is masked there as well.
    quiet = gate().process(make_utterance([0.8, 0.2], [text, "the heron lift is making a grinding noises"],
                                          entities=[lift]))
    assert quiet.trace[-1].scores["safety_rule"] is None
    assert quiet.decision == "accept"
    # The verb outside the name still asks, in the result ...
    order = "lift the heron lift"
    lifted = Entity(id="machine.heron_lift", type="machine", name="heron lift", span=(9, 19), heard="heron lift",
                    score=0.95)
    asked = gate().process(make_utterance([0.9, 0.1], [order, "x"], entities=[lifted]))
    assert (asked.decision, asked.trace[-1].scores["rule"]) == ("confirm", "safety:word:lift")
    # ... and in a likely runner-up.
    runner = gate().process(make_utterance([0.8, 0.2], [text, "lift the heron lift now"], entities=[lift]))
    assert runner.trace[-1].scores["rule"] == "safety:word:lift (runner-up)"


def test_the_recognisers_own_confidence_is_a_feature_as_a_log() -> None:
    utterance = make_utterance([0.6, 0.4], ["tell the front desk", "tell the front desks"])
    assert gate().features(utterance).asr_log_conf is None  # no `conf` given: unknown
    # As received: a later duplicate dropped by merging still counts, and the highest conf wins.
    utterance.payload = {"nbest": [{"text": "tell the front desk"}, {"text": "tell the front desks", "conf": 0.02},
                                   {"text": "tell the front desk", "conf": 0.5}]}
    features = gate().features(utterance)
    assert features.asr_log_conf == pytest.approx(math.log(0.5))
    assert features.values()["asr_log_conf"] == pytest.approx(-0.693147, abs=1e-6)
    # A posterior that underflowed to 0 is floored, not -inf.
    utterance.payload = {"nbest": [{"text": "x", "conf": 0.0}]}
    assert gate().features(utterance).asr_log_conf == ASR_LOG_FLOOR


def test_a_message_without_any_conf_is_marked_unless_the_recogniser_never_gives_one() -> None:
    utterance = make_utterance([0.6, 0.4], ["tell the front desk", "tell the front desks"])
    utterance.payload = {"nbest": [{"text": "tell the front desk"}, {"text": "tell the front desks"}]}
    assert gate().features(utterance).values()["asr_no_conf"] == 1.0
    # Told the recogniser never gives one, its absence says nothing: unknown.
    assert gate(asr_gives_conf=False).features(utterance).values()["asr_no_conf"] is None
    # A `conf` on any entry, even a later one, is a confidence given.
    utterance.payload = {"nbest": [{"text": "tell the front desk"}, {"text": "tell the front desks", "conf": 0.3}]}
    assert gate().features(utterance).values()["asr_no_conf"] == 0.0


def test_the_shipped_model_reads_a_missing_conf_as_doubt_only_where_one_is_expected() -> None:
    text = "book the corvin bandsaw"
    entity = Entity(id="machine.x", type="machine", name="corvin bandsaw", span=(9, 23), heard="corvin bandsaw",
                    score=0.97, support=1.0, heard_exactly=1.0, margin=0.6, origin="exact")
    def sure(stage: GateStage, nbest: list[dict[str, object]]) -> float:
        utterance = make_utterance([0.9, 0.1], [text, "look the corvin bandsaw"], entities=[entity])
        utterance.payload = {"nbest": nbest}
        return float(stage.process(utterance).trace[-1].scores["confidence"])
    given = [{"text": text, "conf": math.exp(default_confidence().features["asr_log_conf"].center)}]
    missing = [{"text": text}]
    # A conf at the model's own centre adds nothing through asr_log_conf, so the two differ by the
    # missing-conf term alone.
    assert sure(_default_gate(), missing) < sure(_default_gate(), given)
    never = GateStage(GateSettings(asr_gives_conf=False), context=CONTEXT)
    never.load()
    assert sure(never, missing) == pytest.approx(sure(never, given))


def test_the_recognisers_word_probabilities_are_a_feature_as_a_mean_log() -> None:
    utterance = make_utterance([0.6, 0.4], ["tell the front desk", "tell the front desks"])
    assert gate().features(utterance).asr_word_mean is None  # none given: unknown
    # Only the first hypothesis as received carries them (FORMATS leaves room for extra fields).
    utterance.payload = {"nbest": [{"text": "tell the front desk", "word_probs": [0.9, 0.8, 0.5, 0.1]},
                                   {"text": "tell the front desks", "word_probs": [1.0, 1.0, 1.0, 1.0]}]}
    features = gate().features(utterance)
    # ln 0.9 + ln 0.8 + ln 0.5 + ln 0.1 = ln 0.036 (the product), over four words.
    assert features.asr_word_mean == pytest.approx(math.log(0.036) / 4)
    assert features.values()["asr_word_mean"] == features.asr_word_mean
    # A word heard with probability 0 is floored, not -inf; a list that is not probabilities is unknown.
    utterance.payload = {"nbest": [{"text": "x y", "word_probs": [0.0, 1.0]}]}
    assert gate().features(utterance).asr_word_mean == pytest.approx(ASR_LOG_FLOOR / 2)
    for bad in ([], [1.5], ["0.5"], [True], "0.5", None):
        utterance.payload = {"nbest": [{"text": "x", "word_probs": bad}]}
        assert gate().features(utterance).asr_word_mean is None, bad


def _default_gate() -> GateStage:
    stage = GateStage(GateSettings(), context=CONTEXT)  # the shipped confidence, nothing configured
    stage.load()
    return stage


def test_the_trace_says_how_sure_the_gate_was_and_what_weighed_most() -> None:
    text = "book the corvin bandsaw"
    entity = Entity(id="machine.x", type="machine", name="corvin bandsaw", span=(9, 23), heard="corvin bandsaw",
                    score=0.97, support=1.0, heard_exactly=1.0, margin=0.6, origin="exact")
    scores = _default_gate().process(make_utterance([0.9, 0.1], [text, "look the corvin bandsaw"],
                                                    entities=[entity])).trace[-1].scores
    assert 0.0 < scores["confidence"] < 1.0
    assert scores["accept_at"] == GateSettings().accept_confidence
    assert len(scores["weighed"]) == 3 and all(isinstance(v, float) for v in scores["weighed"].values())


def test_a_correction_that_overwrote_words_the_nbest_was_sure_of_lowers_confidence() -> None:
    # The same correction, once over words nobody agreed on and once over everyday words the
    # whole N-best held ("stock" -> "dock"): the shipped model must be less sure of the second.
    text = "book the corvin bandsaw"
    fix = Correction(stage="lexicon", before="carving band", after="corvin bandsaw", score=0.9, reason="phonetic")
    gate_ = _default_gate()
    def sure(overridden: float) -> float:
        entity = Entity(id="machine.x", type="machine", name="corvin bandsaw", span=(9, 23), heard="carving band",
                        score=0.9, support=0.8, heard_exactly=0.0, margin=0.3, overridden=overridden, origin="general")
        utterance = make_utterance([0.9, 0.1], [text, "x"], entities=[entity], corrections=[fix])
        return float(gate_.process(utterance).trace[-1].scores["confidence"])
    assert sure(0.9) < sure(0.0)


def test_a_correction_no_hypothesis_heard_lowers_confidence() -> None:
    # The same result, once as the recogniser heard it word for word and once as a rewrite that
    # no hypothesis holds on thin sound evidence: the second must not be surer.
    text = "book the corvin bandsaw"
    heard = Entity(id="machine.x", type="machine", name="corvin bandsaw", span=(9, 23), heard="corvin bandsaw",
                   score=0.9, support=1.0, heard_exactly=1.0, margin=0.5, origin="exact")
    invented = Entity(id="machine.x", type="machine", name="corvin bandsaw", span=(9, 23), heard="carving",
                      score=0.9, support=0.0, heard_exactly=0.0, margin=0.05, origin="general")
    fix = Correction(stage="lexicon", before="carving", after="corvin bandsaw", score=0.9, reason="phonetic")
    gate_ = _default_gate()
    sure = gate_.process(make_utterance([0.9, 0.1], [text, "x"], entities=[heard])).trace[-1].scores["confidence"]
    unsure = gate_.process(make_utterance([0.9, 0.1], [text, "x"], entities=[invented],
                                          corrections=[fix])).trace[-1].scores["confidence"]
    assert unsure < sure


def test_an_entity_a_correction_wrote_as_an_alias_counts_as_invented() -> None:
    # The chain wrote "quillan", an alias of the quillan router, over "kettle on" that no
    # hypothesis held as the alias: invented, though the entry's name is not the words written.
    # ("quillan" sits at characters 7-14 of the text.)
    text = "is the quillan"
    fix = Correction(stage="lexicon", before="kettle on", after="quillan", score=0.94, reason="phonetic")
    alias = Entity(id="machine.quillan_router", type="machine", name="quillan router", span=(7, 14), heard="kettle on",
                   score=0.94, support=0.0, heard_exactly=0.0, margin=0.09, origin="general")
    utterance = make_utterance([0.6, 0.4], [text, "is the cattle on"], entities=[alias], corrections=[fix])
    assert backing(utterance, 3)["invented"] == 1
    # Heard word for word by some hypothesis, the same correction invents nothing.
    heard = Entity(id="machine.quillan_router", type="machine", name="quillan router", span=(7, 14), heard="quillan",
                   score=0.94, support=0.5, heard_exactly=0.5, margin=0.09, origin="exact")
    assert backing(make_utterance([0.6, 0.4], [text, "x"], entities=[heard], corrections=[fix]), 3)["invented"] == 0


def test_the_gate_warns_once_when_the_first_messages_never_give_a_conf(caplog: pytest.LogCaptureFixture) -> None:
    from stages.gate.stage import CONF_CHECK_MESSAGES

    def run(stage: GateStage, messages: int, conf_at: int | None = None) -> list[str]:
        caplog.clear()
        with caplog.at_level(logging.WARNING, logger="rehear.gate"):
            for number in range(messages):
                utterance = make_utterance([0.9, 0.1], ["tell the front desk", "x"])
                entry: dict[str, object] = {"text": "tell the front desk"}
                if number == conf_at:
                    entry["conf"] = 0.4
                utterance.payload = {"nbest": [entry]}
                stage.process(utterance)
        return [r.getMessage() for r in caplog.records if r.name == "rehear.gate"]

    warned = run(_default_gate(), CONF_CHECK_MESSAGES + 20)
    assert len(warned) == 1 and "asr_gives_conf: false" in warned[0]
    assert run(_default_gate(), CONF_CHECK_MESSAGES - 1) == []  # too few to tell
    assert run(_default_gate(), CONF_CHECK_MESSAGES, conf_at=CONF_CHECK_MESSAGES - 1) == []  # one gave it
    told = GateStage(GateSettings(asr_gives_conf=False), context=CONTEXT)
    told.load()
    assert run(told, CONF_CHECK_MESSAGES) == []

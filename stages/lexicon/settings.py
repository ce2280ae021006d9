"""The lexicon stage's settings: files and trace at the top, then one group per concern.

``match`` scores span/entry pairs for every way of finding entries; ``general``, ``anchored``
and ``carrier`` are the three ways (every span of the N-best; names right after a hint word;
slots of in-domain lines that everyday words hold), each with its own floors and guards;
``priors`` and ``context`` add what is known beside the sound. Configurations written with
the earlier flat names still load: ``OLD_NAMES`` says where each one went.
"""

from __future__ import annotations

from pathlib import Path

from pydantic import BaseModel, ConfigDict, Field, model_validator

from relay.core.setting_names import AcceptsOldNames

__all__ = ["OLD_NAMES", "AnchoredSettings", "CarrierSettings", "ContextSettings", "DeriveSettings", "GeneralSettings",
           "LexiconSettings", "MatchSettings", "PriorSettings"]


class _Group(BaseModel):
    model_config = ConfigDict(extra="forbid")


class MatchSettings(_Group):
    """How spans of the N-best and lexicon forms are paired and scored."""

    candidates: int = Field(3, ge=1, le=50, description="entries taken from the phone index per span")
    min_retrieval: float = Field(0.2, ge=0, le=1, description="least phone n-gram Dice score to consider a pair")
    max_postings: int = Field(60, ge=1, description="phone n-grams held by more forms than this are not indexed")
    weight_phone: float = Field(0.6, ge=0, description="weight of phone alignment similarity")
    weight_spelling: float = Field(0.2, ge=0, description="weight of spelling similarity (rapidfuzz)")
    weight_keys: float = Field(0.2, ge=0, description="weight of Double Metaphone key agreement")
    min_phone: float = Field(0.6, ge=0, le=1, description="least phone similarity for a span/entry pair")
    align_floor: float = Field(0.4, ge=0, le=1, description="least unit-cost phone similarity for a pair to be "
                               "aligned at all (a cheap screen before the feature alignment)")
    pair_floor: float = Field(0.45, ge=0, le=1, description="span/entry pairs scoring less are ignored")
    # 3: a third to a half of the names the phone index missed on the example scenarios were
    # one vowel or voicing change away; this finds them (recall +4 to +7 points, measured).
    broad_candidates: int = Field(3, ge=0, le=50, description="entries also taken per span from an index of "
                                  "broad phone classes (vowels as one, voicing ignored); 0: none")
    broad_min_retrieval: float = Field(0.2, ge=0, le=1, description="least broad-class n-gram Dice score")
    # 3 and 0.6: names with a vowel put in or left out and a hushing sound changed ("chandlery"
    # heard as "chandelry") share too few n-grams with their form in the other two indexes;
    # measured on both example scenarios, entity precision +0.2 points and recall up to +0.4,
    # nothing lower (stages/lexicon/README.md).
    skeleton_candidates: int = Field(3, ge=0, le=50, description="entries also taken per span from an index of "
                                     "consonant skeletons (vowels and h left out, voicing ignored); 0: none")
    skeleton_min_retrieval: float = Field(0.6, ge=0, le=1, description="least skeleton n-gram Dice score")
    # 1: the most Whisper recall at precision >= 0.96 on the workshop (0.903 / 0.971 off -> 0.908 /
    # 0.969); on the boatyard, not looked at to choose it, 0.837 / 0.981 -> 0.851 / 0.980, and
    # pocketsphinx +1.4 and +1.6 points of recall on the two (stages/lexicon/README.md).
    realign_slack: int | None = Field(1, ge=0, le=3, description="where a strong entry was not retrieved in "
                                      "a hypothesis, the words there aligned with its best sighting are scored "
                                      "against that form, and runs this many words longer or shorter at either "
                                      "end too; None: a hypothesis without a sighting counts 0")
    costs: Path | None = Field(None, description="phone confusion costs learned from the recogniser's output "
                               "(`rehear learn-costs`); default: the hand-set feature costs")

    @model_validator(mode="after")
    def _weights_present(self) -> MatchSettings:
        if self.weight_phone + self.weight_spelling + self.weight_keys <= 0:
            raise ValueError("at least one of weight_phone, weight_spelling, weight_keys must be positive")
        return self


class GeneralSettings(_Group):
    """The guards of the general search, which weighs every span of the N-best."""

    min_score: float = Field(0.6, ge=0, le=2, description="least entry score for a correction")
    common_min_score: float = Field(0.8, ge=0, le=2, description="least score to rewrite a span of common words")
    common_relief: float = Field(0.02, ge=0, le=0.2, description="common_min_score eased per word past the first")
    common_zipf: float = Field(4.0, ge=0, le=8, description="Zipf frequency from which a word is common")
    margin: float = Field(0.05, ge=0, le=1, description="least lead over the runner-up for the same words")
    short_phones: int = Field(6, ge=0, le=20, description="forms of at most this many phones are short")
    short_penalty: float = Field(0.2, ge=0, le=1, description="more score needed to correct into a short form")
    hint_window: int = Field(3, ge=1, le=10, description="words before a span searched for a type hint")
    hint_penalty: float = Field(0.15, ge=0, le=1, description="more score needed when a hinted type lacks its hint")
    hint_bonus: float = Field(0.1, ge=0, le=1, description="score added when a hinted type has its hint")
    # 0.3: on Whisper output of both example scenarios it halved the right words that corrections
    # broke and raised precision by 2-4 points, for about one point of recall (stages/lexicon/README.md).
    heard_weight: float = Field(0.3, ge=0, le=2, description="more score needed per unit of belief that the "
                                "words were said as heard (everyday words the whole N-best agrees on)")
    # 0.5 and 0.4: chosen by a rule applied to the workshop's Whisper output (the most recall at
    # no less precision than without the recogniser's word probabilities: 0.899 / 0.967 -> 0.901 /
    # 0.971); the boatyard's, which the rule did not read, 0.831 / 0.976 -> 0.835 / 0.981
    # (stages/lexicon/README.md). Output without word_probs (pocketsphinx) is unchanged.
    heard_sureness: float = Field(0.5, ge=0, le=4, description="where the recogniser gives word probabilities "
                                  "(word_probs), the heard-as-said belief is scaled by their mean raised to this; "
                                  "0: they are not used")
    heard_weight_probs: float = Field(0.4, ge=0, le=2, description="heard_weight for words whose belief includes "
                                      "the recogniser's word probabilities (heard_sureness)")
    # 0.03: on Whisper output of both example scenarios, right words broken 18 -> 13 (workshop) and
    # precision +0.6 / +0.4 points, for 0.7 points of recall on the workshop and none on the boatyard
    # (stages/lexicon/README.md).
    heard_short_penalty: float = Field(0.03, ge=0, le=1, description="more score needed, on top of the "
                                       "heard-as-said bar, to correct into a short form")
    # 0.6, match.min_phone's floor for any span/entry pair: the words a correction replaces must
    # themselves be a near match. On the workshop's Whisper output precision 0.946 -> 0.959 for
    # 0.7 points of recall; the boatyard's unchanged; pocketsphinx (not looked at to choose it)
    # +0.2 / +0.5 precision, -0.4 / -0.5 recall (stages/lexicon/README.md).
    kept_min_phone: float = Field(0.6, ge=0, le=1, description="when a correction keeps heard words at either "
                                  "end, least phone similarity of the words it replaces; 0: off")
    min_support: float = Field(0.0, ge=0, le=1, description="least posterior share of hypotheses that must hold "
                               "the entry by a strong sound match for its words to be rewritten")


class PriorSettings(_Group):
    """What is known of an entry before it is heard."""

    affinity_weight: float = Field(0.15, ge=0, le=1, description="score added per unit of speaker affinity")
    entry_weight: float = Field(0.05, ge=0, le=1, description="score added per unit of log entry weight")


class ContextSettings(_Group):
    """The in-domain language model's judgement of a correction (a noisy-channel context term)."""

    language_model: Path | None = Field(None, description="ARPA or kenlm model; default: domain.language_model")
    gain_weight: float = Field(0.01, ge=0, le=1, description="score added per nat the sentence gains by a correction")
    loss_weight: float = Field(0.06, ge=0, le=1, description="score taken per nat the sentence loses by a correction")
    cap: float = Field(10.0, ge=0, le=100, description="a correction's gain (nats) is clipped to +-this")


class AnchoredSettings(_Group):
    """Names looked for right after a word that announces their type, with a looser phone floor."""

    # Off by default: measured on both example scenarios, searching the types the text announces
    # (derived hints and anchors) moved recall by under a point and cost precision on one of them.
    types: list[str] = Field(default_factory=list, description="entity types searched after their hint words")
    min_phone: float = Field(0.68, ge=0, le=1, description="least phone similarity of a match")
    min_gain: float = Field(8.0, ge=-100, le=100, description="least gain (nats) under the in-domain LM")
    margin: float = Field(0.0, ge=0, le=1, description="least phone lead of a match over another entry")
    min_phones: int = Field(8, ge=0, le=40, description="forms with fewer phones are not searched for")
    align_floor: float = Field(0.3, ge=0, le=1, description="least unit-cost phone similarity for a pair to be "
                               "aligned at all (carrier slot fills use it too)")
    at_start: bool = Field(False, description="a name may also begin the sentence")
    max_words: int = Field(5, ge=1, le=8, description="longest span tried")
    hints: dict[str, list[str]] | None = Field(None, description="type -> more words after which a name may begin "
                                               "(besides the top-level hints); default: the anchors the in-domain "
                                               "text shows (derive.anchor_*)")
    floors: dict[str, float] = Field(default_factory=dict, description="type -> its own min_phone")
    hypotheses: int = Field(10, ge=1, le=50, description="hypotheses searched, likeliest first")
    min_pooled: float = Field(0.0, ge=0, le=1, description="least phone similarity pooled by posterior")


class DeriveSettings(_Group):
    """How hints and anchors are read off the in-domain text when the settings give none: from
    the words that stand right before each type's slots (stages/indomain/hints.py)."""

    hint_count: int = Field(2, ge=1, description="a hint stands before the type's slots at least this often")
    hint_share: float = Field(0.6, ge=0, le=1, description="and at least this share of the slots it stands before "
                              "are of that type")
    anchor_count: int = Field(2, ge=1, description="an anchor stands before the type's slots at least this often")
    anchor_share: float = Field(0.2, ge=0, le=1, description="and before at least this share of the type's slots")


class CarrierSettings(_Group):
    """In-domain lines as templates: a line that matches a hypothesis except for a slot that
    everyday words hold says which type those words should be."""

    text: Path | None = Field(None, description="in-domain text whose lines are the templates; default: domain.text")
    min_phone: float = Field(0.7, ge=0, le=1, description="least phone similarity of a slot's fill")
    margin: float = Field(0.03, ge=0, le=1, description="least phone lead of a fill over another entry")
    hypotheses: int = Field(4, ge=1, le=50, description="hypotheses read, likeliest first; each slot takes its "
                            "best fill")
    loose_from: int = Field(3, ge=0, le=20, description="lines with at least this many carrier words also match "
                            "with one of them misheard (0: exact only)")
    # -2: a fill the in-domain LM finds much less likely than the words heard ("turn off all the
    # lights" -> "the router") is a slot the speaker did not fill. On both scenarios' Whisper output it
    # raised precision by 0.2-0.4 points at equal recall; on pocketsphinx (not looked at to choose it)
    # by 0.3-0.6 points at equal recall (stages/lexicon/README.md).
    min_gain: float = Field(-2.0, ge=-100, le=100, description="least gain (nats) of the sentence under the "
                            "in-domain LM by the fill; a fill the LM finds much less likely than the heard "
                            "words is refused")
    # Off by default: a carrier phrase is itself the evidence that everyday words hold a slot, and
    # on the example scenarios weighing the heard reading here cost recall and saved no precision.
    heard_weight: float = Field(0.0, ge=0, le=2, description="more phone similarity needed per unit of belief "
                                "that the slot's words were said as heard")


# Each flat name the stage took before its settings were grouped, and where it lives now.
OLD_NAMES: dict[str, str] = {
    "candidates": "match.candidates",
    "min_retrieval": "match.min_retrieval",
    "max_postings": "match.max_postings",
    "weight_phone": "match.weight_phone",
    "weight_spelling": "match.weight_spelling",
    "weight_keys": "match.weight_keys",
    "min_phone": "match.min_phone",
    "min_edit": "match.align_floor",
    "pair_floor": "match.pair_floor",
    "min_score": "general.min_score",
    "common_min_score": "general.common_min_score",
    "common_relief": "general.common_relief",
    "common_zipf": "general.common_zipf",
    "margin": "general.margin",
    "short_phones": "general.short_phones",
    "short_penalty": "general.short_penalty",
    "hint_window": "general.hint_window",
    "hint_penalty": "general.hint_penalty",
    "hint_bonus": "general.hint_bonus",
    "type_hints": "hints",
    "affinity_weight": "priors.affinity_weight",
    "weight_prior": "priors.entry_weight",
    "lm_model": "context.language_model",
    "lm_weight": "context.gain_weight",
    "lm_loss_weight": "context.loss_weight",
    "lm_cap": "context.cap",
    "slot_types": "anchored.types",
    "slot_min_phone": "anchored.min_phone",
    "slot_min_gain": "anchored.min_gain",
    "slot_margin": "anchored.margin",
    "slot_min_phones": "anchored.min_phones",
    "slot_min_edit": "anchored.align_floor",
    "slot_at_start": "anchored.at_start",
    "slot_max_words": "anchored.max_words",
    "slot_hints": "anchored.hints",
    "slot_floors": "anchored.floors",
    "slot_hypotheses": "anchored.hypotheses",
    "slot_min_pooled": "anchored.min_pooled",
    "carrier_text": "carrier.text",
    "carrier_min_phone": "carrier.min_phone",
    "carrier_margin": "carrier.margin",
    "carrier_hypotheses": "carrier.hypotheses",
    "carrier_loose_from": "carrier.loose_from",
}


class LexiconSettings(AcceptsOldNames):
    """Settings of the lexicon stage."""

    old_names = OLD_NAMES

    lexicon: Path | None = Field(None, description="lexicon file (.csv, .yaml, .yml or .json); default: domain.lexicon")
    speakers: Path | None = Field(None, description="speaker,id,affinity CSV for personal priors; default: domain.speakers")
    max_span_words: int | None = Field(None, ge=1, le=8, description="longest span; default longest entry + 1")
    trace_top: int = Field(5, ge=0, le=50, description="candidates recorded in the trace")
    hints: dict[str, list[str]] | None = Field(None, description="type -> words that announce it; default: the "
                                               "hints the in-domain text shows (derive.hint_*), none without text")
    derive: DeriveSettings = Field(default_factory=DeriveSettings, description="hints and anchors from the text")
    match: MatchSettings = Field(default_factory=MatchSettings, description="pairing and scoring spans and forms")
    general: GeneralSettings = Field(default_factory=GeneralSettings, description="the general search's guards")
    priors: PriorSettings = Field(default_factory=PriorSettings, description="speaker affinity and entry weight")
    context: ContextSettings = Field(default_factory=ContextSettings, description="the in-domain LM's judgement")
    anchored: AnchoredSettings = Field(default_factory=AnchoredSettings, description="names right after a hint word")
    carrier: CarrierSettings = Field(default_factory=CarrierSettings, description="slots of in-domain lines")

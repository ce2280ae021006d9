"""The reading every correction competes with: the words were heard right (issue: first do no harm).

The examples are the issue's own, on invented words: entries that sound near everyday words
the speaker may well have said.
"""

from __future__ import annotations

from pathlib import Path

from relay.core.utterance import Hypothesis
from stages.lexicon.heard import heard_belief, heard_reading, recogniser_sureness
from stages.lexicon.sound.pronounce import common_words
from tests.stages.lexicon.fixtures import SMALL_LEXICON, blocked, run, small_chain

NEAR_WORDS = SMALL_LEXICON + """machine.dust_fan,machine,dust fan,,,1.0
place.loft,place,the loft,,,1.0
material.acetone,material,acetone,,,1.0
"""


def _hyp(text: str, posterior: float) -> Hypothesis:
    return Hypothesis(text, 0, {}, tokens=text.split(), posterior=posterior)


def test_belief_is_agreement_times_commonness() -> None:
    zipf = common_words()
    sure = [_hyp("first thing tomorrow", 0.6), _hyp("first thing tomorrow please", 0.4)]
    assert heard_belief(["tomorrow"], sure, zipf) == 1.0  # every hypothesis, an everyday word
    split = [_hyp("first thing tomorrow", 0.6), _hyp("first thing dunmorrow", 0.4)]
    assert heard_belief(["tomorrow"], split, zipf) == 0.6
    # A rare word (not in the common-word list) is as likely a misheard name as a word.
    assert heard_belief(["quillan"], [_hyp("the quillan", 1.0)], zipf) == 0.0
    # Hypotheses that read the words as part of the name do not count for the heard reading.
    assert heard_belief(["tomorrow"], split[:1] + sure[1:], zipf, holding={1}) == 0.6
    # Only whole words in a row count: "the water" is not in "bathe water", nor "on" in "gone"
    # (every word here is an everyday one, so the belief is the agreement alone).
    inside = [_hyp("bathe water gone", 0.5), _hyp("is the water on", 0.5)]
    assert [heard_belief(run.split(), inside, zipf) for run in ("the water", "water on", "water gone", "on gone")] == [
        0.5, 0.5, 0.5, 0.0]


def test_an_inflected_everyday_word_counts_as_everyday() -> None:
    zipf = common_words()
    for word, stem in (("pallets", "pallet"), ("sanding", "sand"), ("varnished", "varnish")):
        assert word not in zipf and stem in zipf  # only the stem is listed
        assert heard_belief([word], [_hyp(f"the {word}", 1.0)], zipf) > 0.2  # stem frequency less half a step


def test_the_possessive_or_clitic_s_of_an_everyday_word_counts_as_everyday() -> None:
    zipf = common_words()
    # Whisper writes "the power's gone"; the list holds "it's" and "people's", not every noun's.
    # None of these forms is in the list; only the bare word (or its stem) is.
    for word in ("power's", "boat's", "boats'"):
        assert heard_belief([word], [_hyp(f"the {word} gone", 1.0)], zipf) > 0.5, word  # the stem's, half a step rarer
    # A name's possessive stays as rare as the name.
    assert heard_belief(["quillan's"], [_hyp("the quillan's", 1.0)], zipf) == 0.0


def test_a_correctly_heard_word_is_not_overwritten_by_a_near_entry(tmp_path: Path) -> None:
    chain = small_chain(tmp_path, NEAR_WORDS)
    utt = run(chain, "the loft got dusted overnight")
    assert [e.id for e in utt.entities] == ["place.loft"]
    assert utt.text == "the loft got dusted overnight"
    assert any(b["id"] == "machine.dust_fan" and b["guard"] == "heard_right" for b in blocked(utt))


def test_the_same_words_are_corrected_when_the_heard_reading_has_no_weight(tmp_path: Path) -> None:
    # What the guard stops, as a check that the example is a near miss at all.
    chain = small_chain(tmp_path, NEAR_WORDS, general={"heard_weight": 0.0})
    utt = run(chain, "the loft got dusted overnight")
    assert "machine.dust_fan" in [e.id for e in utt.entities]


def test_a_name_the_n_best_disagrees_on_is_still_found(tmp_path: Path) -> None:
    chain = small_chain(tmp_path, NEAR_WORDS)
    utt = run(chain, "book the quill and router", "book the quillan router", "book the quill an router")
    assert [e.id for e in utt.entities] == ["machine.quillan_router"]


# A short alias (3 phones) that an everyday word misses by one vowel, weighted so that its
# score (0.92) clears both the short-form bar (0.8) and the heard-as-said bar (0.9) alone.
SHORT_ALIAS = SMALL_LEXICON + "machine.wren_overlocker,machine,wren overlocker,wren,,3.0\n"


def test_a_short_form_must_beat_the_heard_reading_by_more(tmp_path: Path) -> None:
    # "we've run short": both reasons for doubt hold at once, a short form that matches everyday
    # words by chance and an everyday word the whole N-best agrees on, and their bars add.
    heard = ("we've run short of glue again",) * 2
    kept = run(small_chain(tmp_path, SHORT_ALIAS), *heard)
    assert kept.text == "we've run short of glue again" and not kept.entities
    assert [(b["id"], b["guard"]) for b in blocked(kept)] == [("machine.wren_overlocker", "heard_right")]
    # Without the added bar the same words are rewritten: the example is a near miss at all.
    rewritten = run(small_chain(tmp_path, SHORT_ALIAS, general={"heard_short_penalty": 0.0}), *heard)
    assert rewritten.text == "we've wren short of glue again"


def test_sureness_is_the_mean_word_probability_raised_to_the_exponent() -> None:
    assert recogniser_sureness([0.25, None, 0.81], 0.5) == (0.53) ** 0.5  # unknown words left out
    assert recogniser_sureness([0.4, 0.6], 1.0) == 0.5
    assert recogniser_sureness([None, None], 0.5) is None  # nothing known: the belief stands alone
    assert recogniser_sureness(None, 0.5) is None
    assert recogniser_sureness([0.5], 0.0) is None  # exponent 0: not used


def test_words_the_recogniser_doubted_yield_to_a_near_entry(tmp_path: Path) -> None:
    # "the loft got dusted overnight", the whole N-best agreeing: kept when the recogniser was
    # sure of "dusted", corrected when it doubted that one word (as it does of a name it turned
    # into everyday words). The default weights are used; only the word probabilities differ.
    chain = small_chain(tmp_path, NEAR_WORDS)
    said = "the loft got dusted overnight"
    sure = run(chain, said, word_probs=[0.99, 0.98, 0.97, 0.95, 0.99])
    assert sure.text == said
    assert any(b["id"] == "machine.dust_fan" and b["guard"] == "heard_right" for b in blocked(sure))
    doubted = run(chain, said, word_probs=[0.99, 0.98, 0.97, 0.02, 0.99])
    assert "machine.dust_fan" in [e.id for e in doubted.entities]
    # Without word probabilities (pocketsphinx gives none) the N-best and the language decide alone.
    assert run(chain, said).text == said
    # The weight for words with probabilities is their own: at 0 the guard does not hold them.
    unweighted = small_chain(tmp_path, NEAR_WORDS, general={"heard_weight_probs": 0.0})
    assert "machine.dust_fan" in [e.id for e in run(unweighted, said, word_probs=[0.99] * 5).entities]


def test_the_heard_reading_takes_the_recogniser_s_sureness_where_it_is_known() -> None:
    zipf = common_words()
    split = [_hyp("first thing tomorrow", 0.6), _hyp("first thing dunmorrow", 0.4)]
    # The N-best and the language alone: 0.6 of the posterior holds "tomorrow", an everyday word.
    assert heard_reading(["tomorrow"], split, zipf, holding=(), probs=None, sureness=0.5) == (0.6, False)
    assert heard_reading(["tomorrow"], split, zipf, holding=(), probs=[None], sureness=0.5) == (0.6, False)
    # With the recogniser's 0.25 for the word, times its square root.
    assert heard_reading(["tomorrow"], split, zipf, holding=(), probs=[0.25], sureness=0.5) == (0.3, True)

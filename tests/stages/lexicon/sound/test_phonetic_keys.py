"""Double Metaphone keys (the `metaphone` package), checked against the algorithm's own examples."""

from __future__ import annotations

import pytest
from metaphone import doublemetaphone

from stages.lexicon.compile import phonetic_keys, word_run_keys

# Source: L. Philips, "The Double Metaphone Search Algorithm", C/C++ Users Journal, June 2000,
# and the examples in the comments of the reference C++ implementation published with it.
# From memory; the reference code cuts keys at 4 characters, so only 4 are compared.
PUBLISHED = [
    ("Smith", "SM0", "XMT"), ("Schmidt", "XMT", "SMT"), ("Caesar", "SSR", ""),
    ("Chianti", "KNT", ""), ("Michael", "MKL", "MXL"), ("Chemistry", "KMST", ""),
    ("Chorus", "KRS", ""), ("McHugh", "MK", ""), ("Czerny", "SRN", "XRN"),
    ("focaccia", "FKX", ""), ("bacchus", "PKS", ""), ("edgar", "ATKR", ""),
    ("tagliaro", "TKLR", "TLR"), ("hochmeier", "HKMR", ""), ("Jankelowicz", "JNKL", "ANKL"),
    ("Arnoff", "ARNF", ""), ("Xavier", "SF", "SFR"),
]


@pytest.mark.parametrize("word, primary, alternate", PUBLISHED)
def test_published_double_metaphone_examples(word: str, primary: str, alternate: str) -> None:
    got_primary, got_alternate = doublemetaphone(word)
    assert got_primary[:4] == primary
    assert got_alternate[:4] == alternate


def test_keys_of_split_and_merged_words_agree() -> None:
    assert phonetic_keys("band saw") == phonetic_keys("bandsaw")
    assert phonetic_keys("smith") == ("SM0", "XMT")


@pytest.mark.parametrize("words", [("smith",), ("schmidt", "caesar"), ("band", "saw", "michael"), ()])
def test_keys_of_split_words_are_the_keys_of_their_text(words: tuple[str, ...]) -> None:
    # Per word (Philips 2000, as above): Smith SM0/XMT, Schmidt XMT/SMT; a run joins them.
    assert word_run_keys(words) == phonetic_keys(" ".join(words))
    if words == ("schmidt", "caesar"):
        assert word_run_keys(words) == ("XMTSSR", "SMTSSR")

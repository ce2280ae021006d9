import pytest

from stages.normalize.tokens import number_words, tokenize


@pytest.mark.parametrize(
    ("value", "words"),
    [
        (0, "zero"),
        (13, "thirteen"),
        (40, "forty"),
        (99, "ninety nine"),
        (101, "one hundred one"),
        (2304, "two thousand three hundred four"),
        (1_000_000, "one million"),
    ],
)
def test_number_words(value: int, words: str) -> None:
    assert " ".join(number_words(value)) == words


def test_number_words_rejects_negative() -> None:
    with pytest.raises(ValueError, match="non-negative"):
        number_words(-1)


@pytest.mark.parametrize(
    ("text", "tokens"),
    [
        ("Start the pump in Zone 3!", "start the pump in zone three"),
        ("meet at 2:30, not 10:05", "meet at two thirty not ten oh five"),
        ("the 3rd bay and the 21st", "the third bay and the twenty first"),
        ("raise it 1.5%", "raise it one point five percent"),
        ("Don't   move\tthe  O'Brien-Smith jig", "don't move the o'brien smith jig"),
        ("ﬁle ＡＢＣ", "file abc"),  # NFKC folds ligatures and full-width letters
        ("", ""),
        ("?!  ...", ""),
    ],
)
def test_tokenize(text: str, tokens: str) -> None:
    assert " ".join(tokenize(text)) == tokens


def test_tokenize_is_idempotent() -> None:
    once = tokenize("Book bay 4 at 2:30 for Łukasz & co.")
    assert tokenize(" ".join(once)) == once

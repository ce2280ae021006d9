import pytest

from stages.normalize.tokens import number_words, readings, tokenize


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
        # As a modern recogniser writes them: grouped thousands, a bare fraction, a list.
        ("Move 1,200 kilos to Bay 3.", "move one thousand two hundred kilos to bay three"),
        ("set it to .8, then 2, 3, 4", "set it to zero point eight then two three four"),
        ("12,34 and 1,2345", "twelve thirty four and one two thousand three hundred forty five"),
        ("a 10-4 from tank 26.5", "a ten four from tank twenty six point five"),
    ],
)
def test_tokenize(text: str, tokens: str) -> None:
    assert " ".join(tokenize(text)) == tokens


def test_tokenize_is_idempotent() -> None:
    once = tokenize("Book bay 4 at 2:30 for Łukasz & co.")
    assert tokenize(" ".join(once)) == once


def test_number_words_agree_with_num2words() -> None:
    # Outside reference: the num2words package (English), which says "and" after the hundreds
    # and separates groups with commas, British style; rehear reads numbers without "and".
    from num2words import num2words

    for value in [*range(0, 1200), 2304, 10_000, 65_536, 999_999, 1_000_001, 7_200_000_015]:
        expected = num2words(value).replace(",", "").replace("-", " ").replace(" and ", " ").split()
        assert number_words(value) == expected, value
        ordinal = num2words(value, to="ordinal").replace(",", "").replace("-", " ").replace(" and ", " ")
        assert tokenize(f"{value}th" if value % 10 not in (1, 2, 3) or value % 100 in (11, 12, 13) else
                        f"{value}{ {1: 'st', 2: 'nd', 3: 'rd'}[value % 10]}") == ordinal.split(), value


@pytest.mark.parametrize(("text", "expected"), [
    ("back in at 10.15.", ["back in at ten point one five", "back in at ten fifteen"]),
    ("at 1130, please", ["at one thousand one hundred thirty please", "at eleven thirty please"]),
    ("at 7.30 or 9.45", ["at seven point three zero or nine point four five", "at seven thirty or nine point four five",
                         "at seven point three zero or nine forty five", "at seven thirty or nine forty five"]),
    ("12.75 tonnes at 2.5%", ["twelve point seven five tonnes at two point five percent"]),  # no such clock
    ("on the 23rd, 1,200 kilos", ["on the twenty third one thousand two hundred kilos"]),
    ("version 1.2.3", ["version one point two three"]),
    # Run-together hundreds: a full hour is "eleven hundred", and "200" is only two hundred.
    ("at 1100 sharp", ["at one thousand one hundred sharp", "at eleven hundred sharp"]),
    ("200 litres of diesel", ["two hundred litres of diesel"]),
    ("back by 7.00", ["back by seven point zero zero", "back by seven"]),
])
def test_numbers_that_may_be_clock_times_have_a_second_reading(text: str, expected: list[str]) -> None:
    assert [" ".join(r) for r in readings(text)] == expected
    assert readings(text)[0] == tokenize(text)

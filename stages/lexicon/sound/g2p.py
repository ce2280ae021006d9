"""Grapheme-to-phoneme conversion for words the pronouncing dictionary lacks.

The model is a joint-sequence model (Bisani and Ney 2008, "Joint-sequence models for
grapheme-to-phoneme conversion", Speech Communication 50(5)): a word is spelled and
pronounced at once by a sequence of graphones, each one letter with zero, one or two phones
(``x`` -> ``K S``, silent ``e`` -> nothing), and an n-gram model over graphones, estimated
with interpolated modified Kneser-Ney (stages/kneser_ney.py), scores the sequence. Prediction
searches the graphone sequences that spell the word, letter by letter with a beam, and reads
the phones off the best one.

The n-gram model is held as a backoff automaton in numpy arrays: a state is an n-gram
history; an arc (state, graphone) carries ln p and the state it leads to; a graphone with no
arc from a state is scored from the state's parent (its history less the oldest graphone)
plus the state's backoff weight. scripts/train_g2p.py aligns CMUdict and trains the model.
"""

from __future__ import annotations

import json
import math
import re
from collections.abc import Iterable, Sequence
from functools import lru_cache
from importlib import resources
from pathlib import Path
from typing import Any

import numpy as np

from relay.core.errors import StageError
from stages.lexicon.sound.kernels import compiled
from stages.lm.kneser_ney import BOS, EOS, estimate

__all__ = ["DEFAULT_BEAM", "MODEL_FILE", "G2PModel", "default_model", "graphone"]

MODEL_FILE = "g2p_graphones.npz"
FORMAT = 2  # 2: the automaton's links (parent state, next state) are stored, not rebuilt at load
DEFAULT_BEAM = 16  # hypotheses kept per letter; 8 lost ~0.5 points of word error, 32 gained ~0.1

_NEVER = -99.0  # ln p of what cannot happen; finite so sums stay finite

Label = tuple[str, ...]

# Records of the arcs (sorted by state, then graphone) and of the states, laid out as the
# compiled decoder's C structs (_lexfast.c): the arcs of state s run from its ``first``
# to the next state's.
_ARC = np.dtype([("token", "<i4"), ("next", "<i4"), ("logp", "<f8")], align=True)
_STATE = np.dtype([("first", "<i4"), ("parent", "<i4"), ("backoff", "<f8")], align=True)


def graphone(letter: str, phones: Sequence[str]) -> str:
    """The token of one letter with its phones: ``x:K S``, ``e:`` for a silent letter."""
    return f"{letter}:{' '.join(phones)}"


class G2PModel:
    """Predicts an ARPAbet phone sequence (stress-free) for a spelled word."""

    def __init__(self, *, order: int, graphones: Sequence[str], keys: np.ndarray, logp: np.ndarray,
                 is_state: np.ndarray, backoff: np.ndarray, info: dict[str, Any] | None = None,
                 beam: int = DEFAULT_BEAM, links: tuple[np.ndarray, np.ndarray] | None = None) -> None:
        """Arcs sorted by key = state * len(graphones) + graphone; see ``from_alignments``.

        ``links``: each state's parent and each arc's next state, as ``to_file`` stores them;
        rebuilt from the keys when not given (which costs time and about 40 MB at load).
        """
        self.order = order
        self.graphones = list(graphones)
        self.info = info or {}
        self.beam = beam
        vocab = len(self.graphones)
        self._vocab = vocab
        self._probe = np.append(np.asarray(keys, dtype=np.int64), np.iinfo(np.int64).max)
        self._keys = self._probe[:-1]  # the sentinel at the end keeps searches in range
        self._is_state = np.asarray(is_state, dtype=bool)
        backoff = np.asarray(backoff, dtype=np.float64)
        if len(self._keys) >= 2**31 or len(backoff) >= 2**31:
            raise ValueError(f"{len(self._keys)} n-grams, {len(backoff)} states: too many to number in 32 bits")
        # One record per arc and per state, so the compiled decoder reads each with one memory
        # access; the numpy code works on views of the same fields.
        self._arcs = np.zeros(len(self._keys), dtype=_ARC)
        self._arcs["token"] = self._keys % vocab
        self._arcs["logp"] = logp
        self._states = np.zeros(len(backoff) + 1, dtype=_STATE)  # a last row ends the last state's arcs
        self._states["backoff"][:-1] = backoff
        self._logp = self._arcs["logp"]
        self._next = self._arcs["next"]
        self._backoff = self._states["backoff"][:-1]
        self._parent = self._states["parent"][:-1]
        parent, nxt = links if links is not None else self._link()
        if len(parent) != len(self._parent) or len(nxt) != len(self._next):
            raise ValueError("stored links do not fit the model's states and arcs")
        self._parent[:] = parent
        self._next[:] = nxt
        arcs_per_state = np.bincount(self._keys // vocab, minlength=len(backoff))
        self._states["first"][1:] = np.cumsum(arcs_per_state)
        index = {token: i for i, token in enumerate(self.graphones)}
        self._eos = index[EOS]
        self._start = int(self._next[self._find(np.array([index[BOS]], dtype=np.int64))[0]])
        by_letter: dict[str, list[int]] = {}
        self._phones: list[Label] = []
        for i, token in enumerate(self.graphones):
            letter, colon, phones = token.partition(":")
            self._phones.append(tuple(phones.split()) if colon else ())
            if colon and len(letter) == 1:
                by_letter.setdefault(letter, []).append(i)
        self._by_letter = {c: np.array(ids, dtype=np.int64) for c, ids in by_letter.items()}
        # what segment() drops from a lower-cased word: all but the letters a-z the model spells
        spelled = "".join(sorted(c for c in self._by_letter if "a" <= c <= "z"))
        self._unspelled = re.compile(f"[^{spelled}]" if spelled else r"[\s\S]")
        # The graphones of letter c, for the compiled decoder: _letter_ids[_letter_at[c]:_letter_at[c + 1]].
        alphabet = [chr(ord("a") + i) for i in range(26)]
        widths = [len(self._by_letter.get(c, ())) for c in alphabet]
        self._letter_at = np.concatenate([[0], np.cumsum(widths)]).astype(np.int64)
        self._letter_ids = np.concatenate([self._by_letter.get(c, np.zeros(0, dtype=np.int64)) for c in alphabet])
        self._cached = lru_cache(maxsize=65536)(self._predict)

    @property
    def arcs(self) -> int:
        """Number of stored n-grams."""
        return len(self._keys)

    # -- building ---------------------------------------------------------------------------

    @classmethod
    def from_alignments(cls, words: Iterable[Sequence[tuple[str, Label]]], order: int, *,
                        info: dict[str, Any] | None = None) -> G2PModel:
        """Estimate the graphone n-gram from aligned words, each a list of (letter, phones)."""
        if order < 2:
            raise ValueError(f"graphone n-gram order must be at least 2 (a start state), got {order}")
        sentences = [[graphone(letter, phones) for letter, phones in word] for word in words]
        model = estimate(sentences, order)
        graphones = sorted({gram[0] for gram in model.probs[0]} | {BOS})
        index = {token: i for i, token in enumerate(graphones)}
        vocab = len(graphones)
        # States are the histories, numbered by length, then by (parent state, last graphone),
        # so the arcs sorted by key meet the states they create in numbering order.
        state: dict[tuple[str, ...], int] = {(): 0}
        backoff = [0.0]
        for k in range(order - 1):
            level = sorted(model.backoffs[k].items(), key=lambda kv: (state[kv[0][:-1]], index[kv[0][-1]]))
            for history, gamma in level:
                state[history] = len(backoff)
                backoff.append(math.log(gamma) if gamma > 0 else _NEVER)
        # <s> is never predicted; its arc from the root only leads to the start state
        arcs = sorted([(index[BOS], _NEVER, True)] + [
            (state[gram[:-1]] * vocab + index[gram[-1]], math.log(p), gram in state)
            for level in model.probs for gram, p in level.items()
        ])
        return cls(
            order=order, graphones=graphones, info=info,
            keys=np.array([a[0] for a in arcs], dtype=np.int64),
            logp=np.array([a[1] for a in arcs]),
            is_state=np.array([a[2] for a in arcs], dtype=bool),
            backoff=np.array(backoff),
        )

    def _find(self, keys: np.ndarray) -> np.ndarray:
        """Index of each key among the arcs, or -1."""
        at = self._probe.searchsorted(keys)  # the sentinel at the end keeps ``at`` in range
        return np.where(self._probe[at] == keys, at, -1)

    def _link(self) -> tuple[np.ndarray, np.ndarray]:
        """Each state's parent and each arc's next state, worked out level by level.

        An arc that is itself a history leads to that state; any other leads where the arc of
        its suffix (the same graphone from the parent state) leads. The parent of a new state
        is where that suffix arc leads.
        """
        n_states = 1 + int(self._is_state.sum())
        if len(self._backoff) != n_states:
            raise ValueError(f"{len(self._backoff)} backoff weights for {n_states} states")
        state_ids = np.zeros(len(self._keys), dtype=np.int64)
        state_ids[self._is_state] = np.arange(1, n_states)
        source = self._keys // self._vocab
        token = self._keys % self._vocab
        parent = np.zeros(n_states, dtype=np.int64)
        nxt = np.zeros(len(self._keys), dtype=np.int64)
        low, high = 0, 1  # states of the current level
        for _ in range(self.order):
            first, last = np.searchsorted(source, [low, high])
            if first == last:
                break
            arcs = np.arange(first, last)
            if low == 0:
                suffix_next = np.zeros(len(arcs), dtype=np.int64)
            else:
                suffix = self._find(parent[source[arcs]] * self._vocab + token[arcs])
                if (suffix < 0).any():
                    raise ValueError("an n-gram lacks its lower-order suffix")
                suffix_next = nxt[suffix]
            new = self._is_state[arcs]
            nxt[arcs] = np.where(new, state_ids[arcs], suffix_next)
            parent[state_ids[arcs][new]] = suffix_next[new]
            created = state_ids[arcs][new]
            if not len(created):
                break
            low, high = int(created[0]), int(created[-1]) + 1
        return parent, nxt

    # -- files ------------------------------------------------------------------------------

    @classmethod
    def from_file(cls, path: Path | str) -> G2PModel:
        try:
            with np.load(path, allow_pickle=False) as data:
                if int(data["format"]) != FORMAT:
                    raise ValueError(f"format {int(data['format'])}, expected {FORMAT}")
                return cls(
                    order=int(data["order"]),
                    graphones=[str(g) for g in data["graphones"]],
                    keys=np.cumsum(data["key_gaps"], dtype=np.int64),
                    logp=data["logp"], is_state=data["is_state"], backoff=data["backoff"],
                    info=json.loads(str(data["info"])),
                    links=(data["parent"], data["next"]),
                )
        except (OSError, ValueError, KeyError) as exc:
            raise StageError("lexicon", f"cannot read G2P model {path}: {exc}") from None

    def to_file(self, path: Path | str) -> None:
        """Compressed arrays; keys as gaps, log-probabilities as float16 (ample for ranking)."""
        gaps = np.diff(self._keys, prepend=0)
        with open(path, "wb") as handle:
            np.savez_compressed(
                handle, format=np.array(FORMAT), order=np.array(self.order),
                graphones=np.array(self.graphones), key_gaps=gaps.astype(np.uint32),
                logp=self._logp.astype(np.float16), is_state=self._is_state,
                backoff=self._backoff.astype(np.float16), info=np.array(json.dumps(self.info)),
                parent=self._parent.astype(np.int32), next=self._next.astype(np.int32),
            )

    # -- prediction -------------------------------------------------------------------------

    def _score(self, states: np.ndarray, tokens: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """ln p(token | state) and the state after it, backing off where no arc exists."""
        logp = np.zeros(len(states))
        nxt = np.zeros(len(states), dtype=np.int64)
        pending = np.arange(len(states))
        states = states.copy()
        for _ in range(self.order + 1):  # the root has an arc for every graphone
            at = self._find(states[pending] * self._vocab + tokens[pending])
            hit = at >= 0
            done = pending[hit]
            logp[done] += self._logp[at[hit]]
            nxt[done] = self._next[at[hit]]
            pending = pending[~hit]
            if not len(pending):
                break
            logp[pending] += self._backoff[states[pending]]
            states[pending] = self._parent[states[pending]]
        return logp, nxt

    def segment(self, word: str) -> list[tuple[str, Label]]:
        """The best graphone sequence for ``word``: each letter a-z with its phones.

        The compiled decoder (stages/kernels.py) runs the same beam search as ``_decode_numpy``
        with the same arithmetic and tie-breaking, so both choose the same graphones.
        """
        letters = self._unspelled.sub("", word.lower())
        if not letters:
            return []
        chosen = self._decode_compiled(letters) if compiled is not None else self._decode_numpy(letters)
        return [(letter, self._phones[token]) for letter, token in zip(letters, chosen)]

    def _decode_compiled(self, letters: str) -> Sequence[int]:
        """The chosen graphone per letter; ``letters`` holds only letters the model spells."""
        if compiled is None:
            raise RuntimeError("the compiled kernels are not built")
        chosen: tuple[int, ...] = compiled.g2p_decode(letters, self._arcs, self._states, self._letter_ids,
                                                      self._letter_at, self._vocab, self._start, self._eos,
                                                      self.order, self.beam)
        return chosen

    def _decode_numpy(self, letters: str) -> Sequence[int]:
        """The chosen graphone per letter; ``letters`` holds only letters the model spells."""
        states = np.array([self._start], dtype=np.int64)
        scores = np.zeros(1)
        history: list[tuple[np.ndarray, np.ndarray]] = []  # per letter: (source hypothesis, graphone)
        for letter in letters:
            candidates = self._by_letter[letter]
            width = len(candidates)
            source = np.arange(len(states) * width) // width
            tokens = candidates[np.arange(len(source)) % width]
            logp, nxt = self._score(states[source], tokens)
            total = scores[source] + logp
            # best hypothesis per next state (the rest can never overtake it), then the beam
            rank = np.lexsort((-total, nxt))
            ordered = nxt[rank]
            leader = np.ones(len(rank), dtype=bool)
            leader[1:] = ordered[1:] != ordered[:-1]
            first = rank[leader]
            keep = first[np.argsort(-total[first], kind="stable")[: self.beam]]
            states, scores = nxt[keep], total[keep]
            history.append((source[keep], tokens[keep]))
        final, _ = self._score(states, np.full(len(states), self._eos, dtype=np.int64))
        best = int(np.argmax(scores + final))
        chosen: list[int] = []
        for source, tokens in reversed(history):
            chosen.append(int(tokens[best]))
            best = int(source[best])
        return chosen[::-1]

    def _predict(self, word: str) -> tuple[str, ...]:
        return tuple(p for _, phones in self.segment(word) for p in phones)

    def predict(self, word: str) -> tuple[str, ...]:
        """Phones for ``word``; characters other than the letters a-z are ignored."""
        result: tuple[str, ...] = self._cached(word)
        return result


@lru_cache(maxsize=1)
def default_model() -> G2PModel:
    """The model shipped as package data (data/g2p_graphones.npz)."""
    path = resources.files("stages.lexicon.sound") / "data" / MODEL_FILE
    with resources.as_file(path) as real_path:
        return G2PModel.from_file(real_path)

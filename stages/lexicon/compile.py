"""The compiled lexicon: every written form with its phones and keys, and the phone index.

Compiling pronounces every name and alias (CMUdict, the G2P model, or the entry's `say`),
computes Double Metaphone keys and builds the n-gram index. The result is pickled under the
stage's cache directory, named by a hash of the lexicon file's bytes, the G2P model and the
compile format, so it is rebuilt only when one of them changes.
"""

from __future__ import annotations

import hashlib
import os
import pickle
import tempfile
from collections.abc import Sequence
from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path

from metaphone import doublemetaphone
from tqdm import tqdm

from relay.core.errors import ConfigError
from stages.lexicon.data import LexiconEntry, read_lexicon
from stages.lexicon.sound.g2p import MODEL_FILE
from stages.lexicon.sound.phone_index import PhoneIndex
from stages.lexicon.sound.phonetics import BROAD_CLASSES, SKELETON_CLASSES, broad, skeleton
from stages.lexicon.sound.pronounce import Pronouncer
from stages.lexicon.sound.respell import RespellError

__all__ = ["CompiledLexicon", "Form", "compile_entries", "load_compiled", "phonetic_keys", "word_run_keys"]

COMPILE_FORMAT = "lexicon-compiled-11"  # 8: the broad-class index; 9: the skeleton index; 10: small alphabets;
# 11: a respelled syllable ending in "ie" reads as in "tie"


@lru_cache(maxsize=65536)
def _word_keys(word: str) -> tuple[str, str]:
    primary, alternate = doublemetaphone(word)
    return primary, alternate or primary


def phonetic_keys(text: str) -> tuple[str, ...]:
    """Double Metaphone keys of a word run: the words' primary keys joined, and their alternates.

    Joining per-word keys lets "band saw" and "bandsaw" share keys (up to the word-edge rules)
    and lets each word's keys be cached.
    """
    return word_run_keys(text.split())


def word_run_keys(words: Sequence[str]) -> tuple[str, ...]:
    """``phonetic_keys`` of the words joined by spaces, for words already split."""
    if len(words) == 1:
        primary, alternate = _word_keys(words[0])
    else:
        keys = [_word_keys(word) for word in words]
        primary = "".join([k[0] for k in keys])
        alternate = "".join([k[1] for k in keys])
    return (primary, alternate) if alternate != primary else (primary,)


@dataclass(frozen=True, slots=True)
class Form:
    entry: int  # index into CompiledLexicon.entries
    text: str  # normalised tokens joined by spaces
    phones: str  # encoded, one character per phone
    keys: tuple[str, ...]

    @property
    def words(self) -> int:
        return self.text.count(" ") + 1


@dataclass(slots=True)
class CompiledLexicon:
    entries: list[LexiconEntry]
    forms: list[Form]
    index: PhoneIndex
    broad_index: PhoneIndex  # the same forms in broad phone classes (stages.lexicon.sound.phonetics.broad)
    skeleton_index: PhoneIndex  # and as consonant skeletons (stages.lexicon.sound.phonetics.skeleton)
    exact: dict[str, list[int]]  # form text -> form numbers
    max_words: int
    digest: str


def compile_entries(entries: list[LexiconEntry], pronouncer: Pronouncer, *, digest: str = "",
                    progress: bool = False, max_postings: int = 60, source: str = "lexicon") -> CompiledLexicon:
    forms: list[Form] = []
    exact: dict[str, list[int]] = {}
    problems: list[str] = []
    for number, entry in enumerate(tqdm(entries, desc="compile lexicon", disable=not progress, leave=False)):
        for text in entry.forms:
            try:
                phones = pronouncer.form(text, name=entry.name, say=entry.say)
            except RespellError as exc:
                problems.append(f"{source}:{entry.line}: say {entry.say!r} cannot be read: {exc}")
                break
            exact.setdefault(text, []).append(len(forms))
            forms.append(Form(number, text, phones, phonetic_keys(text)))
    if problems:
        raise ConfigError("Lexicon is invalid", problems)
    index = PhoneIndex([form.phones for form in forms], max_postings=max_postings)
    broad_index = PhoneIndex([broad(form.phones) for form in forms], max_postings=max_postings,
                             symbols=len(BROAD_CLASSES))
    skeleton_index = PhoneIndex([skeleton(form.phones) for form in forms], max_postings=max_postings,
                                symbols=len(SKELETON_CLASSES))
    max_words = max(len(form.text.split()) for form in forms)
    return CompiledLexicon(entries, forms, index, broad_index, skeleton_index, exact, max_words, digest)


def _digest(path: Path, max_postings: int) -> str:
    digest = hashlib.sha256()
    digest.update(COMPILE_FORMAT.encode())
    digest.update(repr(max_postings).encode())
    digest.update(path.read_bytes())
    digest.update((Path(__file__).parent / "sound" / "data" / MODEL_FILE).read_bytes())
    return digest.hexdigest()[:24]


def load_compiled(path: Path, cache_dir: Path | None, pronouncer: Pronouncer, *,
                  progress: bool = False, max_postings: int = 60) -> tuple[CompiledLexicon, bool]:
    """The compiled lexicon, from the cache when it is current; also whether the cache served it."""
    try:
        digest = _digest(path, max_postings)
    except OSError as exc:
        raise ConfigError(f"Lexicon {path} cannot be read", [f"{path}: {exc}"]) from None
    cached = cache_dir / f"lexicon-{digest}.pickle" if cache_dir is not None else None
    if cached is not None and cached.exists():
        try:
            with cached.open("rb") as handle:
                compiled = pickle.load(handle)
            if isinstance(compiled, CompiledLexicon) and compiled.digest == digest:
                return compiled, True
        except (OSError, pickle.UnpicklingError, EOFError, AttributeError, ImportError):
            pass  # a damaged or stale cache file is rebuilt below
    compiled = compile_entries(read_lexicon(path), pronouncer, digest=digest, progress=progress,
                               max_postings=max_postings, source=str(path))
    if cached is not None:
        try:
            cached.parent.mkdir(parents=True, exist_ok=True)
            # Write then rename, so a reader never sees half a file.
            descriptor, temporary = tempfile.mkstemp(dir=cached.parent, prefix=".lexicon-", suffix=".tmp")
            with os.fdopen(descriptor, "wb") as out:
                pickle.dump(compiled, out, protocol=pickle.HIGHEST_PROTOCOL)
            os.replace(temporary, cached)
        except OSError:
            pass  # a read-only cache costs the next start a rebuild, never this one its lexicon
    return compiled, False

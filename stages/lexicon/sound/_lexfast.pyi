from collections.abc import Sequence
from typing import Any

from typing_extensions import Buffer

def search(
    queries: Sequence[str], lookup: Buffer, offsets: Buffer, postings: Buffer, sizes: Buffer, counts: Buffer,
    touched: Buffer, least_size: float, k: int, min_score: float, out_query: Buffer, out_item: Buffer,
    out_score: Buffer, char_base: int, phones: int, base: int, offset4: int, recast: Buffer | None = None, /,
) -> int: ...
version: int

def alignment_costs(
    a: Sequence[str], b: Sequence[str], substitution: Buffer, insertion: Buffer, deletion: Buffer, stride: int,
    char_base: int, out: Buffer, /,
) -> None: ...
def g2p_decode(
    letters: str, arcs: Buffer, states: Buffer, ids: Buffer, at: Buffer, vocab: int, start: int, eos: int,
    order: int, beam: int, /,
) -> tuple[int, ...]: ...
def word_spans(
    token_lists: Sequence[Sequence[str]], sound_lists: Sequence[Sequence[str]], longest: int, /,
) -> tuple[list[tuple[str, ...]], list[str], list[str], list[list[tuple[int, int, int]]]]: ...
def pair_screen(
    span_phones: list[str], forms: list[Any], queries: Buffer, items: Buffer, screen: float, substitution: Buffer,
    insertion: Buffer, deletion: Buffer, stride: int, char_base: int, phone_weight: float, spelling_weight: float,
    key_weight: float, min_phone: float, floor: float, out_query: Buffer, out_item: Buffer, out_score: Buffer, /,
) -> int: ...
def pair_finish(
    span_texts: list[str], span_keys: list[tuple[str, ...] | None] | None, forms: list[Any], queries: Buffer,
    items: Buffer, scores: Buffer, count: int, spelling_weight: float, key_weight: float, floor: float, total: float,
    pairs: list[tuple[int, int, float, bool]], /,
) -> None: ...
def pool_pairs(
    occurrences: list[list[tuple[int, int, int]]], pairs: Sequence[tuple[int, int, float, bool]], forms: list[Any],
    posteriors: Sequence[float], strong: float, evidence: Any, sighting: Any, /,
) -> dict[int, Any]: ...
def merge_hits(query: Buffer, item: Buffer, more_query: Buffer, more_item: Buffer, out_query: Buffer, out_item: Buffer, /) -> int: ...

from pathlib import Path

import orjson

from relay.workbench.corpus import read_corpus
from relay.workbench.nearmiss import alias_suggestions, find_near_misses, training_examples
from stages.lexicon.data import LexiconEntry


def _corpus(tmp_path: Path, lines: list[dict[str, object]]) -> Path:
    path = tmp_path / "corpus.jsonl"
    path.write_bytes(b"".join(orjson.dumps(line) + b"\n" for line in lines))
    return path


def _line(uid: str, reference: str, entity: tuple[str, str] | None, *heard: str) -> dict[str, object]:
    return {
        "id": uid,
        "reference": reference,
        "entities": [{"id": entity[0], "text": entity[1]}] if entity else [],
        "message": {"id": uid, "nbest": [{"text": h} for h in heard]},
    }


LEXICON = {"place.bay_3": LexiconEntry("place.bay_3", "place", "bay three", (), None, 1.0, 2)}


def test_near_miss_labels_heard_words_as_the_entity(tmp_path: Path) -> None:
    corpus = _corpus(tmp_path, [
        _line("u1", "open bay three please", ("place.bay_3", "bay three"),
              "open day three please", "open day three please", "hope and a tree"),
    ])
    misses, examples = find_near_misses(read_corpus(corpus))
    assert [(m.entity, m.heard, m.rank) for m in misses] == [("place.bay_3", "day three", 0)]
    record = training_examples(examples, LEXICON)[0]
    assert record["text"] == "open day three please"
    entity = record["entities"][0]
    assert record["text"][slice(*entity["span"])] == "day three"
    assert entity["value"] == "bay three" and entity["type"] == "place"


def test_badly_heard_context_is_no_near_miss(tmp_path: Path) -> None:
    corpus = _corpus(tmp_path, [
        _line("u1", "open bay three please", ("place.bay_3", "bay three"), "hope in day three fleas"),
        _line("u2", "open bay three please", ("place.bay_3", "bay three"), "open bay three please"),
        _line("u3", "hello there", None, "yellow hair"),
    ])
    misses, examples = find_near_misses(read_corpus(corpus))
    assert misses == [] and examples == []


def test_alias_suggestions_count_utterances_not_hypotheses(tmp_path: Path) -> None:
    corpus = _corpus(tmp_path, [
        _line("u1", "open bay three", ("place.bay_3", "bay three"), "open day three", "open day three now"),
        _line("u2", "close bay three", ("place.bay_3", "bay three"), "close day three"),
        _line("u3", "lock bay three", ("place.bay_3", "bay three"), "lock big three"),
    ])
    misses, _ = find_near_misses(read_corpus(corpus), max_context_error=0.5)
    assert alias_suggestions(misses, min_count=2) == [("place.bay_3", "day three", 2)]

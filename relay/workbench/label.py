"""`rehear label`: walk through captured or logged recogniser messages and write the labelled
corpus (docs/formats.md section 5) that `eval` and `tune` read.

Each message is shown with its N-best list and what the chain makes of it now; a person accepts
rehear's words, takes one of the hypotheses, types the right words, or skips. Entities are
proposed from the lexicon against the chosen words. Every answer is appended to the output at
once, so stopping anywhere loses nothing, and a second run goes on where the first stopped
(ids already labelled, or skipped and listed in OUTPUT.skipped, are not asked again).
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, TextIO

import orjson

from relay.core.chain import Chain
from relay.core.errors import InputError
from relay.core.fieldmap import FieldMap
from relay.core.stage import deciding_stage
from relay.live.capture import capture_files
from relay.live.messages import parse_message
from relay.live.routing import is_final
from relay.workbench.corpus import json_objects
from relay.workbench.terminal import Keyboard
from stages.lexicon.data import LexiconEntry
from stages.normalize.tokens import tokenize

__all__ = ["Pending", "Tally", "label", "propose_entities", "read_pending"]

_SHOWN = 9  # hypotheses shown, each with its key


@dataclass(frozen=True, slots=True)
class Pending:
    """A recogniser message waiting for its label; ``where`` is ``file:line``."""

    where: str
    message: dict[str, Any]

    @property
    def id(self) -> str:
        return str(self.message.get("id", ""))


@dataclass(slots=True)
class Tally:
    accepted: int = 0
    corrected: int = 0
    skipped: int = 0
    left: int = 0
    unreadable: int = 0
    ids: list[str] = field(default_factory=list)


def _files(paths: Sequence[Path]) -> list[Path]:
    out: list[Path] = []
    for path in paths:
        if path.is_dir():
            out += capture_files(path) or sorted(path.glob("*.jsonl"))
        else:
            out.append(path)
    return out


def read_pending(paths: Sequence[Path], *, field_map: FieldMap | None = None, tally: Tally | None = None
                 ) -> Iterator[Pending]:
    """Recogniser messages from capture files (what the relay received) or plain JSON Lines of
    recogniser messages (a recogniser's log); a directory means its capture or .jsonl files.
    Dead letters, partial results and messages the relay could not read are passed over."""
    for path in _files(paths):
        for where, value in json_objects(path, "messages"):
            message = value.get("message") if ("sent" in value or "reference" in value) else value
            readable = isinstance(message, dict)
            if readable:
                try:
                    utterance = parse_message(orjson.dumps(message), topic=where, field_map=field_map,
                                              max_payload_bytes=1 << 30)
                    readable = is_final(utterance)
                except InputError:
                    readable = False
            if not readable:
                if tally is not None:
                    tally.unreadable += 1
                continue
            yield Pending(where=where, message=message)  # type: ignore[arg-type]


def propose_entities(words: str, entries: Sequence[LexiconEntry]) -> list[tuple[str, str]]:
    """(id, words) of lexicon forms found in ``words``, longest first, not overlapping; a form
    several entries share goes to the heaviest."""
    forms: dict[tuple[str, ...], LexiconEntry] = {}
    for entry in entries:
        for form in entry.forms:
            key = tuple(form.split())
            if key not in forms or entry.weight > forms[key].weight:
                forms[key] = entry
    tokens = tokenize(words)
    longest = max((len(k) for k in forms), default=0)
    found: list[tuple[int, str, str]] = []
    taken = [False] * len(tokens)
    for size in range(min(longest, len(tokens)), 0, -1):
        for start in range(len(tokens) - size + 1):
            key = tuple(tokens[start:start + size])
            if key in forms and not any(taken[start:start + size]):
                found.append((start, forms[key].id, " ".join(key)))
                taken[start:start + size] = [True] * size
    return [(entity_id, text) for _, entity_id, text in sorted(found)]


def _done(output: Path) -> set[str]:
    done: set[str] = set()
    for path in (output, output.with_name(output.name + ".skipped")):
        if not path.is_file():
            continue
        for number, line in enumerate(path.read_bytes().splitlines(), start=1):
            if not line.strip():
                continue
            if path == output:
                try:
                    done.add(str(orjson.loads(line)["id"]))
                except (orjson.JSONDecodeError, KeyError, TypeError):
                    raise InputError("output", f"{path}:{number}: not a labelled corpus line; "
                                               "label into a new file") from None
            else:
                done.add(line.decode("utf-8", "replace").strip())
    return done


class _Screen:
    def __init__(self, chain: Chain, out: TextIO, field_map: FieldMap | None) -> None:
        self.chain = chain
        self.out = out
        self.field_map = field_map
        self.gate = deciding_stage(chain.stages)

    def show(self, item: Pending, number: int, total: int) -> tuple[list[str], str]:
        """Print the message and rehear's result; (hypotheses, rehear's text)."""
        utterance = parse_message(orjson.dumps(item.message), topic=item.where, field_map=self.field_map,
                                  max_payload_bytes=1 << 30)
        hypotheses = [h.text for h in utterance.nbest]
        result = self.chain.process(utterance)
        write = self.out.write
        write(f"\n[{number}/{total}] {item.id}   ({item.where})\n  N-best:\n")
        for key, text in enumerate(hypotheses[:_SHOWN], start=1):
            write(f"    {key}. {text}\n")
        trace = next((t.scores for t in reversed(result.trace) if self.gate and t.stage == self.gate.name), {})
        why = ", ".join(f"{k} {v:.0%}" if isinstance(v, float) else f"{k} {v}"
                        for k, v in (("rule", trace.get("rule")), ("confidence", trace.get("confidence")))
                        if v is not None)
        write(f"  rehear: \"{result.text}\"  [{result.decision or 'no gate'}{': ' + why if why else ''}]\n")
        if result.entities:
            write("    entities: " + ", ".join(f"{e.id} (\"{e.name}\")" for e in result.entities) + "\n")
        return hypotheses, result.text


def label(items: Sequence[Pending], *, chain: Chain, entries: Sequence[LexiconEntry], output: Path,
          keyboard: Keyboard, out: TextIO, field_map: FieldMap | None = None) -> Tally:
    """The labelling loop; appends to ``output`` as it goes. Returns what was done."""
    tally = Tally()
    done = _done(output)
    todo: list[Pending] = []
    for item in items:
        if item.id not in done:
            todo.append(item)
            done.add(item.id)  # a message delivered twice is asked once
    known = {entry.id for entry in entries}
    screen = _Screen(chain, out, field_map)
    skipped_path = output.with_name(output.name + ".skipped")
    with output.open("ab") as corpus, skipped_path.open("a", encoding="utf-8") as skipped, keyboard.keys():
        for number, item in enumerate(todo, start=1):
            hypotheses, text = screen.show(item, number, len(todo))
            words = _words(keyboard, out, hypotheses, text)
            if words is None:  # quit
                tally.left = len(todo) - number + 1
                break
            if words == "":
                skipped.write(item.id + "\n")
                skipped.flush()
                tally.skipped += 1
                continue
            entities = _entities(keyboard, out, words, entries, known)
            if entities is None:
                tally.left = len(todo) - number + 1
                break
            right = tokenize(words) == tokenize(text)
            line = {"id": item.id, "reference": words, "entities": [{"id": i, "text": t} for i, t in entities],
                    "message": item.message, "tags": {"labelled": "accepted" if right else "corrected"}}
            corpus.write(orjson.dumps(line) + b"\n")
            corpus.flush()
            tally.accepted += right
            tally.corrected += not right
            tally.ids.append(item.id)
    return tally


def _words(keyboard: Keyboard, out: TextIO, hypotheses: list[str], text: str) -> str | None:
    """The words said: rehear's, a hypothesis's or typed; "" to skip, None to quit."""
    shown = min(len(hypotheses), _SHOWN)
    out.write(f"  [a] accept rehear's words  [1-{shown}] take that hypothesis  [e] edit the words  "
              "[s] skip  [q] quit\n")
    out.flush()
    while True:
        key = keyboard.key()
        if key in ("q", "\x04", ""):
            return None
        if key == "s":
            return ""
        if key in ("a", "\r", "\n"):
            return text
        if key.isdigit() and 1 <= int(key) <= shown:
            return _edit(keyboard, out, hypotheses[int(key) - 1])
        if key == "e":
            return _edit(keyboard, out, text)


def _edit(keyboard: Keyboard, out: TextIO, start: str) -> str | None:
    try:
        typed = keyboard.line("  words said> ", start).strip()
    except EOFError:
        return None
    return typed or ""


def _entities(keyboard: Keyboard, out: TextIO, words: str, entries: Sequence[LexiconEntry],
              known: set[str]) -> list[tuple[str, str]] | None:
    """The entity ids in ``words``: the lexicon's proposal, kept, cleared or typed; None to quit."""
    proposed = propose_entities(words, entries)
    while True:
        listed = ", ".join(f"{i} (\"{t}\")" for i, t in proposed) or "none"
        out.write(f"  entities: {listed}\n  [y] keep  [n] none  [i] type the ids  [q] quit\n")
        out.flush()
        key = keyboard.key()
        if key in ("q", "\x04", ""):
            return None
        if key in ("y", "\r", "\n"):
            return proposed
        if key == "n":
            return []
        if key == "i":
            try:
                typed = keyboard.line("  entity ids (comma-separated)> ", ", ".join(i for i, _ in proposed))
            except EOFError:
                return None
            ids = [part.strip() for part in typed.split(",") if part.strip()]
            unknown = [i for i in ids if i not in known]
            if unknown:
                out.write(f"  not in the lexicon: {', '.join(unknown)}\n")
                continue
            texts = dict(proposed)
            proposed = [(i, texts.get(i, "")) for i in ids]

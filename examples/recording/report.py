"""Summarise labelled corpora: counts, first-hypothesis and oracle WER, misheard terms.

WER is computed with jiwer (corpus level: all errors over all reference words).
The oracle picks, per utterance, the N-best entry with the fewest word errors.
Whisper writes capitals, punctuation and digits ("Berth 4 at 4:30."), the
references are lowercase words ("berth four at four thirty"), so two WERs are
given: `raw` compares the text as the recogniser wrote it, `norm` after the
report's plain normaliser (textnorm.py, British number words). pocketsphinx
writes lowercase words only, so for it the two are the same.

    python -m examples.recording.report examples/boatyard            # every corpus in scenario.yaml
    python -m examples.recording.report examples/workshop/corpus.jsonl  # one file
"""

from __future__ import annotations

import argparse
import json
import math
import re
import sys
from collections import Counter, defaultdict
from collections.abc import Callable, Iterable
from pathlib import Path
from typing import Any

import jiwer

from examples.recording.scenario import load_settings
from examples.recording.textnorm import normalise

# Written forms a recogniser may use where the reference has words; counted per token.
FORMS: list[tuple[str, re.Pattern[str]]] = [
    ("time h:mm (4:30)", re.compile(r"^\d{1,2}:\d{2}$")),
    ("time h.mm (7.30)", re.compile(r"^([01]?\d|2[0-4])\.[0-5]\d$")),
    ("decimal (2.5)", re.compile(r"^\d*\.\d+$")),
    ("thousands comma (1,200)", re.compile(r"^\d{1,3}(,\d{3})+$")),
    ("percent (10%)", re.compile(r"^\d+(\.\d+)?%$")),
    ("ordinal (3rd)", re.compile(r"^\d+(st|nd|rd|th)$")),
    ("degrees (18°)", re.compile(r"^-?\d+°")),
    ("integer 0-9 (Bay 3)", re.compile(r"^\d$")),
    ("integer 10-99 (12)", re.compile(r"^\d{2}$")),
    ("integer 100+ (430)", re.compile(r"^\d{3,}$")),
    ("other with digits", re.compile(r"\d")),
    ("initials with dots (N.W.I)", re.compile(r"^([A-Za-z]\.){2,}[A-Za-z]?$|^([A-Za-z]\.)+[A-Za-z]$")),
    ("letters joined by hyphens (T-Co)", re.compile(r"^[A-Za-z]{1,2}(-[A-Za-z]+)+$")),
    ("all-capital word (WIN)", re.compile(r"^[A-Z]{2,}$")),
]
PUNCT: list[tuple[str, re.Pattern[str]]] = [
    ("ends with . ? or !", re.compile(r"[.?!]$")),
    ("comma inside", re.compile(r",(?!\d)")),
    ("hyphenated word", re.compile(r"\w-\w")),
    ("capital after the first word", re.compile(r"(?<=\s)[A-Z]")),
    ("quotes or brackets", re.compile(r"[\"()\[\]]")),
]


def errors(reference: str, hypothesis: str) -> int:
    if not hypothesis.strip():
        return len(reference.split())
    out = jiwer.process_words(reference, hypothesis)
    return out.substitutions + out.deletions + out.insertions


def load(path: Path) -> list[dict[str, Any]]:
    rows = []
    for line_no, line in enumerate(path.read_text(encoding="utf-8").splitlines(), start=1):
        try:
            rows.append(json.loads(line))
        except json.JSONDecodeError as exc:
            raise SystemExit(f"{path}:{line_no}: not JSON ({exc})") from exc
    return rows


def wer(rows: list[dict[str, Any]]) -> tuple[float, float, float]:
    """(first raw, first normalised, oracle normalised) WER over `rows`."""
    words = sum(len(r["reference"].split()) for r in rows) or 1
    raw = sum(errors(r["reference"], r["message"]["nbest"][0]["text"]) for r in rows)
    first = sum(errors(r["reference"], normalise(r["message"]["nbest"][0]["text"])) for r in rows)
    oracle = sum(
        min(errors(r["reference"], normalise(h["text"])) for h in r["message"]["nbest"]) for r in rows
    )
    return raw / words, first / words, oracle / words


def groups(
    rows: list[dict[str, Any]], key: Callable[[dict[str, Any]], Any]
) -> dict[str, list[dict[str, Any]]]:
    out: dict[str, list[dict[str, Any]]] = defaultdict(list)
    for row in rows:
        out[str(key(row))].append(row)
    return dict(sorted(out.items()))


def snr_name(row: dict[str, Any]) -> str:
    snr = row["tags"]["snr_db"]
    return "clean" if snr is None else f"{snr} dB"


def auc(scores: list[float], right: list[bool]) -> float:
    """Chance that a right first hypothesis scores above a wrong one (ties count half)."""
    pos = sorted(s for s, r in zip(scores, right) if r)
    neg = [s for s, r in zip(scores, right) if not r]
    if not pos or not neg:
        return math.nan
    total = 0.0
    for n in neg:
        above = sum(1 for p in pos if p > n)
        ties = sum(1 for p in pos if p == n)
        total += above + 0.5 * ties
    return total / (len(pos) * len(neg))


def forms(texts: Iterable[str]) -> tuple[Counter[str], dict[str, Counter[str]], Counter[str]]:
    counts: Counter[str] = Counter()
    examples: dict[str, Counter[str]] = defaultdict(Counter)
    punct: Counter[str] = Counter()
    for text in texts:
        for token in text.split():
            bare = token.strip(".,?!\"'()")
            for name, pattern in FORMS:
                if pattern.search(bare):
                    counts[name] += 1
                    examples[name][bare] += 1
                    break
        for name, pattern in PUNCT:
            if pattern.search(text):
                punct[name] += 1
    return counts, examples, punct


def report(name: str, rows: list[dict[str, Any]], examples: int) -> None:
    print(f"## {name}: {len(rows)} utterances")
    voices = sorted({r["tags"]["voice"] for r in rows})
    snrs = list(groups(rows, snr_name))
    print("\n| | " + " | ".join(snrs) + " | total |\n|---" * 1 + "|---" * (len(snrs) + 1) + "|")
    for voice in voices:
        mine = [r for r in rows if r["tags"]["voice"] == voice]
        cells = [str(sum(1 for r in mine if snr_name(r) == s)) for s in snrs]
        print(f"| {voice} | " + " | ".join(cells) + f" | {len(mine)} |")
    print(
        "| total | "
        + " | ".join(str(sum(1 for r in rows if snr_name(r) == s)) for s in snrs)
        + f" | {len(rows)} |"
    )
    print(
        "\nsplits:",
        dict(Counter(r["tags"]["split"] for r in rows)),
        " entities per utterance:",
        dict(sorted(Counter(len(r["entities"]) for r in rows).items())),
        " N-best length:",
        dict(sorted(Counter(len(r["message"]["nbest"]) for r in rows).items())),
    )
    print("\n| subset | n | first WER raw | first WER norm | oracle WER norm |\n|---|---|---|---|---|")
    subsets = [("all", {"all": rows})]
    subsets += [("", groups(rows, snr_name)), ("", groups(rows, lambda r: r["tags"]["voice"]))]
    subsets += [("", groups(rows, lambda r: r["tags"]["split"]))]
    for _, table in subsets:
        for label, members in table.items():
            raw, first, oracle = wer(members)
            print(f"| {label} | {len(members)} | {raw:.1%} | {first:.1%} | {oracle:.1%} |")

    intact = Counter()
    deeper = 0
    shown = 0
    print()
    for row in rows:
        first = f" {normalise(row['message']['nbest'][0]['text'])} "
        missed = False
        for ent in row["entities"]:
            hit = f" {ent['text']} " in first
            intact[hit] += 1
            missed = missed or not hit
            if not hit and any(
                f" {ent['text']} " in f" {normalise(h['text'])} " for h in row["message"]["nbest"][1:]
            ):
                deeper += 1
        if missed and shown < examples and row["tags"]["snr_db"] is None:
            shown += 1
            print(f"- said `{row['reference']}` / heard `{row['message']['nbest'][0]['text']}`")
    total = sum(intact.values())
    print(
        f"\nentity mentions intact in the first hypothesis (normalised): {intact[True]}/{total} "
        f"({intact[True] / max(total, 1):.1%}); {deeper} of the missed ones appear further down the N-best"
    )

    confs = [(r["message"]["nbest"][0].get("conf"), r) for r in rows]
    if all(c is not None for c, _ in confs):
        right = [normalise(r["message"]["nbest"][0]["text"]) == r["reference"] for _, r in confs]
        line = f"conf AUC (first hypothesis right after normalising, {sum(right)} of {len(right)}): "
        line += f"conf {auc([c for c, _ in confs], right):.3f}"
        probs = [r["message"]["nbest"][0].get("word_probs") for _, r in confs]
        if all(probs):
            line += f", min word prob {auc([min(p) for p in probs], right):.3f}"
            line += f", product of word probs {auc([math.prod(p) for p in probs], right):.3f}"
        print(line)

    firsts = [r["message"]["nbest"][0]["text"] for r in rows]
    counts, samples, punct = forms(firsts)
    if counts:
        print(
            "\nwritten forms in first hypotheses (tokens; a hyphen-joined pair of words counts as letters only when it starts with 1-2 letters):"
        )
        for name, _ in FORMS:
            if counts[name]:
                common = ", ".join(f"{t} ({n})" for t, n in samples[name].most_common(6))
                print(f"- {name}: {counts[name]}  e.g. {common}")
        every = [h["text"] for r in rows for h in r["message"]["nbest"]]
        all_counts, _, _ = forms(every)
        print(
            f"- in all {len(every)} N-best items: "
            + ", ".join(f"{k} {v}" for k, v in all_counts.most_common())
        )
    if any(punct.values()):
        print(
            "punctuation and capitals in first hypotheses (utterances): "
            + ", ".join(f"{k} {v}" for k, v in punct.most_common())
        )
    print()


def corpora(target: Path) -> list[tuple[str, Path]]:
    if target.is_file():
        return [(target.name, target)]
    settings = load_settings(target)
    found = []
    for part in settings.parts.values():
        for recogniser, output in part.outputs.items():
            path = target / output.file
            if path.exists():
                found.append((f"{settings.name} {part.name} {recogniser} ({output.file})", path))
    return found


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(
        description="Counts, WER and misheard lexicon terms of labelled corpora."
    )
    parser.add_argument("target", type=Path, help="a corpus (JSON Lines) or a scenario folder")
    parser.add_argument("--examples", type=int, default=10, help="misheard-term examples to print")
    args = parser.parse_args(argv)
    found = corpora(args.target)
    if not found:
        print(f"no corpus found for {args.target}", file=sys.stderr)
        return 2
    for name, path in found:
        report(name, load(path), args.examples)
    return 0


if __name__ == "__main__":
    sys.exit(main())

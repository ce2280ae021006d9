"""Entity recall and precision of the normalize -> lexicon chain on a labelled corpus (FORMATS 5).

Also reports the same numbers for exact text matching on the first hypothesis alone (what the
lexicon gives without phonetics), and word error rates (jiwer) of the first hypothesis and of
the stage's output, so over-correction shows as a WER rise.

    python benchmarks/eval_lexicon.py examples/workshop --show-misses 20
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

import jiwer

from relay.core.chain import Chain
from relay.core.stage import StageContext
from relay.core.utterance import Hypothesis, Utterance
from relay.workbench.variants import apply_overrides
from stages.lexicon.settings import OLD_NAMES, LexiconSettings
from stages.lexicon.stage import LexiconStage
from stages.normalize.stage import NormalizeSettings, NormalizeStage
from stages.normalize.tokens import tokenize


@dataclass
class Result:
    true_pos: int = 0
    false_pos: int = 0
    false_neg: int = 0
    first_wer: float = 0.0
    out_wer: float = 0.0
    misses: list[str] = field(default_factory=list)
    stage_us: list[float] = field(default_factory=list)

    @property
    def recall(self) -> float:
        return self.true_pos / max(1, self.true_pos + self.false_neg)

    @property
    def precision(self) -> float:
        return self.true_pos / max(1, self.true_pos + self.false_pos)


def utterance(message: dict[str, Any]) -> Utterance:
    nbest = [Hypothesis(h["text"], rank, dict(h)) for rank, h in enumerate(message["nbest"])]
    return Utterance(message["id"], message.get("source", ""), message.get("speaker"), message, nbest)


def build_chain(folder: Path, cache: Path, settings: dict[str, Any]) -> Chain:
    context = StageContext(base_dir=folder, cache_dir=cache)
    params = apply_overrides({"lexicon": "lexicon.csv", "speakers": "speakers.csv"}, settings, OLD_NAMES)
    chain = Chain([NormalizeStage(NormalizeSettings(), context=context),
                   LexiconStage(LexiconSettings(**params), context=context)])
    chain.load()
    return chain


def evaluate(folder: Path, chain: Chain) -> tuple[Result, Result]:
    """(the chain, exact matching on the first hypothesis) over the corpus."""
    stage = chain.stages[1]
    exact_forms = stage._lexicon.exact  # type: ignore[attr-defined]
    forms = stage._lexicon.forms  # type: ignore[attr-defined]
    entries = stage._lexicon.entries  # type: ignore[attr-defined]
    ours, base = Result(), Result()
    refs, firsts, outs = [], [], []
    for line in (folder / "corpus.jsonl").read_text().splitlines():
        row = json.loads(line)
        truth = {e["id"] for e in row["entities"]}
        utt = chain.process(utterance(row["message"]))
        found = {e.id for e in utt.entities}
        ours.stage_us.append(utt.trace[-1].elapsed_us)
        first = tokenize(row["message"]["nbest"][0]["text"])
        plain = {entries[forms[f].entry].id for n in range(1, 5) for i in range(len(first))
                 for f in exact_forms.get(" ".join(first[i:i + n]), ())}
        for result, got in ((ours, found), (base, plain)):
            result.true_pos += len(got & truth)
            result.false_pos += len(got - truth)
            result.false_neg += len(truth - got)
        if found != truth:
            ours.misses.append(f"{row['id']}: said {row['reference']!r} | heard {' '.join(first)!r} -> "
                               f"{utt.text!r} missing {sorted(truth - found)} extra {sorted(found - truth)}")
        refs.append(" ".join(tokenize(row["reference"])) or "-")
        firsts.append(" ".join(first) or "-")
        outs.append(utt.text or "-")
    ours.first_wer = base.first_wer = jiwer.wer(refs, firsts)
    ours.out_wer = jiwer.wer(refs, outs)
    base.out_wer = base.first_wer
    return ours, base


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("folder", type=Path, help="folder with lexicon.csv, speakers.csv, corpus.jsonl")
    parser.add_argument("--show-misses", type=int, default=0, help="print this many wrong utterances")
    parser.add_argument("--set", action="append", default=[], metavar="KEY=JSON",
                        help="override a lexicon setting, dotted inside a group, e.g. --set general.min_score=0.55")
    args = parser.parse_args(argv)
    overrides = {k: json.loads(v) for k, v in (item.split("=", 1) for item in args.set)}
    with tempfile.TemporaryDirectory() as cache:
        ours, base = evaluate(args.folder, build_chain(args.folder.resolve(), Path(cache), overrides))
    for label, r in (("lexicon stage", ours), ("exact text, 1st hyp", base)):
        print(f"{label:20s} recall {r.recall:.3f} precision {r.precision:.3f} "
              f"(tp {r.true_pos} fp {r.false_pos} fn {r.false_neg}) WER {r.out_wer:.3f}")
    print(f"first-hypothesis WER {ours.first_wer:.3f}")
    times = sorted(ours.stage_us)
    print(f"lexicon stage per message: p50 {times[len(times) // 2] / 1000:.2f} ms, "
          f"p99 {times[int(len(times) * 0.99)] / 1000:.2f} ms")
    for miss in ours.misses[: args.show_misses]:
        print(miss)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

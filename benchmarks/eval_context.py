"""Entity accuracy of the default chain (normalize -> lm_rescore -> lexicon -> gate) by corpus half.

Settings of the lexicon stage are tuned on the even-numbered utterance ids and reported on the
odd ones; the odd half is also split by the corpus's `split` tag, since the language model was
estimated from phrasings of the `seen` kind. The main number is the share of utterances whose
set of found entity ids is exactly the reference's.

    python benchmarks/eval_context.py examples/workshop --set context.gain_weight=0.0 \
        --grid general.min_score=0.55,0.6
    (KEY: a lexicon setting, dotted inside a group; each --grid KEY=JSON,JSON,... adds a dimension,
    the product of all grids is evaluated)
"""

from __future__ import annotations

import argparse
import itertools
import json
import sys
from collections.abc import Sequence
from pathlib import Path
from typing import Any

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from relay.workbench.corpus import CorpusItem, read_corpus
from relay.workbench.defaults import folder_config, load_chain
from relay.workbench.evaluate import Outcome, percentile, run_corpus
from relay.workbench.variants import with_overrides


def parity(item_id: str) -> int:
    digits = "".join(ch for ch in item_id.rsplit("-", 1)[-1] if ch.isdigit())
    return int(digits or 0) % 2


def numbers(outcomes: Sequence[Outcome]) -> dict[str, float]:
    tp = sum(len(set(o.found) & o.reference_ids) for o in outcomes)
    fp = sum(len(set(o.found) - o.reference_ids) for o in outcomes)
    fn = sum(len(o.reference_ids - set(o.found)) for o in outcomes)
    words = sum(o.ref_words for o in outcomes) or 1
    lex = [o.stage_us.get("lexicon", 0.0) for o in outcomes]
    return {"n": len(outcomes), "exact": sum(o.entity_ok for o in outcomes) / max(1, len(outcomes)),
            "recall": tp / max(1, tp + fn), "precision": tp / max(1, tp + fp),
            "wer": sum(o.errors_relay for o in outcomes) / words, "lex_p50": percentile(lex, 50) / 1000,
            "lex_p99": percentile(lex, 99) / 1000}


def groups(outcomes: Sequence[Outcome]) -> dict[str, list[Outcome]]:
    even = [o for o in outcomes if parity(o.id) == 0]
    odd = [o for o in outcomes if parity(o.id) == 1]
    return {"even": even, "odd": odd,
            "odd seen": [o for o in odd if o.tags.get("split") == "seen"],
            "odd novel": [o for o in odd if o.tags.get("split") == "novel"],
            "all": list(outcomes)}


def evaluate(folder: Path, items: list[CorpusItem], lexicon: dict[str, Any], cache: Path) -> list[Outcome]:
    raw = folder_config(folder, cache_dir=cache)
    raw = with_overrides(raw, {"lexicon": lexicon}) if lexicon else raw
    return run_corpus(load_chain(raw, base_dir=folder), items)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("folder", type=Path, help="folder with lexicon.csv, speakers.csv, train.txt, corpus.jsonl")
    parser.add_argument("--grid", action="append", default=[], metavar="KEY=JSON,JSON",
                        help="lexicon setting and the values to try")
    parser.add_argument("--set", action="append", default=[], metavar="KEY=JSON", help="fixed lexicon setting")
    parser.add_argument("--snr", default="15", help="leave out lines with this tags.snr_db (empty keeps all)")
    parser.add_argument("--cache", type=Path, default=Path(".rehear-cache"))
    parser.add_argument("--show-misses", type=int, default=0, help="print this many wrong odd utterances")
    args = parser.parse_args(argv)
    folder = args.folder.resolve()
    items = [i for i in read_corpus(folder / "corpus.jsonl")
             if not args.snr or str(i.tags.get("snr_db")) != args.snr]
    fixed = {k: json.loads(v) for k, v in (s.split("=", 1) for s in args.set)}
    dims = [(k, json.loads(f"[{v}]")) for k, v in (g.split("=", 1) for g in args.grid)]
    for values in itertools.product(*(v for _, v in dims)) if dims else [()]:
        setting = fixed | dict(zip((k for k, _ in dims), values))
        outcomes = evaluate(folder, items, setting, args.cache.resolve())
        print(f"== {setting or 'defaults'}")
        for name, part in groups(outcomes).items():
            r = numbers(part)
            print(f"  {name:10s} n={r['n']:3.0f} exact {r['exact']:.3f} recall {r['recall']:.3f} "
                  f"precision {r['precision']:.3f} WER {r['wer']:.3f} lexicon p50/p99 "
                  f"{r['lex_p50']:.2f}/{r['lex_p99']:.2f} ms")
        for o in [o for o in outcomes if parity(o.id) == 1 and not o.entity_ok][: args.show_misses]:
            print(f"  {o.id}: {o.reference!r} | {o.first!r} -> {o.text!r} "
                  f"missing {sorted(o.reference_ids - set(o.found))} extra {sorted(set(o.found) - o.reference_ids)}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

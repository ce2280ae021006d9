"""Learned phone costs (`rehear learn-costs`) against the hand costs, on data they were not fitted on.

For each scenario and recogniser, the default chain (benchmarks/matrix.py) runs three times:

- hand: the feature-based costs (nothing fitted; every utterance measured);
- cross: costs fitted on the other scenario's main corpus file of the same recogniser;
- held out: costs fitted on the even-numbered utterance ids of this corpus file and measured
  on the odd ones, then the reverse; the two halves' outcomes pooled.

Fits read the main corpus file only (clean, 20-25 dB and, for the workshop, 15 dB lines), never
the 10 dB files; results are printed by part, as matrix.py prints them. Each fitted cost model
is also set beside Miller and Nicely's consonant confusions (tests/data/miller_nicely_1955.csv),
as are the confusion rates the fit counted (its expected counts, before the hand-cost prior).

    python benchmarks/learned_costs.py
    python benchmarks/learned_costs.py --focus errors --hypotheses 5 --prior-weight 20 --json out.json
"""

from __future__ import annotations

import argparse
import csv
import json
import math
import re
import sys
import tempfile
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from matrix import CORPORA, ROOT, SCENARIOS, chain_for, part_of, row  # noqa: E402 - a sibling script

from relay.workbench.alignment import align, aligned_span  # noqa: E402
from relay.workbench.confusions import Learned, LearnOptions, learn  # noqa: E402
from relay.workbench.corpus import CorpusItem, read_corpus  # noqa: E402
from relay.workbench.evaluate import Outcome, run_corpus  # noqa: E402
from stages.lexicon.data import read_lexicon  # noqa: E402
from stages.lexicon.sound.costfile import write_costs  # noqa: E402
from stages.lexicon.sound.phonetics import PHONES, CostModel, batch_similarity, contrast  # noqa: E402
from stages.lexicon.sound.pronounce import Pronouncer  # noqa: E402
from stages.normalize.tokens import tokenize  # noqa: E402

MILLER_NICELY = ROOT / "tests" / "data" / "miller_nicely_1955.csv"


def number(item: CorpusItem) -> int:
    found = re.search(r"(\d+)$", item.id)
    if found is None:
        raise ValueError(f"{item.where}: id {item.id!r} ends in no number, so it has no parity")
    return int(found.group(1))


def fit(items: list[CorpusItem], folder: Path, options: LearnOptions, out: Path) -> Learned:
    entries = {entry.id: entry for entry in read_lexicon(folder / "lexicon.csv")}
    learned = learn(items, entries, options=options)
    write_costs(out, learned.model, {"fitted on": f"{len(items)} lines", "scale": learned.scale})
    return learned


class Misheard:
    """Each entity mention the first hypothesis got wrong: its heard words' phones and the entry meant.

    Ranking every lexicon entry by phone similarity to those phones, where does the meant one
    come? A measure of the costs alone, free of the stage's thresholds (tuned on the hand costs).
    """

    def __init__(self, folder: Path, items: list[CorpusItem]) -> None:
        pronouncer = Pronouncer()
        entries = read_lexicon(folder / "lexicon.csv")
        self.forms = [pronouncer.form(form, name=e.name, say=e.say) for e in entries for form in e.forms]
        self.owner = np.array([n for n, e in enumerate(entries) for _ in e.forms])
        number = {e.id: n for n, e in enumerate(entries)}
        self.mentions: list[tuple[str, int, CorpusItem]] = []
        for item in items:
            reference = tokenize(item.reference)
            heard = tokenize(item.utterance().nbest[0].text)
            pairs = align(reference, heard)
            for entity_id, text in item.entity_texts:
                part = tokenize(text)
                start = next((i for i in range(len(reference)) if reference[i:i + len(part)] == part), None)
                if start is None or not part:
                    continue
                span = aligned_span(pairs, start, start + len(part))
                if span is not None and heard[span[0]:span[1]] != part:
                    phones = pronouncer.words(heard[span[0]:span[1]])
                    self.mentions.append((phones, number[entity_id], item))

    def ranks(self, model: CostModel, keep: set[str] | None = None) -> list[int]:
        """Per mention (of the items in ``keep``, all when None): 1 + how many other entries score higher."""
        found = []
        for phones, meant, item in self.mentions:
            if keep is not None and item.id not in keep:
                continue
            similarity = batch_similarity([phones] * len(self.forms), self.forms, model)
            best = np.full(int(self.owner.max()) + 1, -1.0)
            np.maximum.at(best, self.owner, similarity)
            found.append(1 + int(np.sum(best > best[meant])))
        return found


def rank(values: Sequence[float]) -> np.ndarray:
    """Ranks from 0, ties sharing their mean rank (as Spearman's coefficient wants)."""
    array = np.asarray(values, dtype=np.float64)
    order = np.argsort(array, kind="stable")
    ranks = np.empty(len(array))
    ranks[order] = np.arange(len(array))
    for value in np.unique(array):
        tied = array == value
        ranks[tied] = ranks[tied].mean()
    return ranks


def kind(a: str, b: str) -> str:
    """What a consonant pair changes (stages.lexicon.sound.phonetics.contrast)."""
    return contrast(a, b)


def miller_nicely_table() -> dict[frozenset[str], float]:
    with MILLER_NICELY.open(encoding="utf-8") as handle:
        rows = [r for r in csv.reader(line for line in handle if not line.startswith("#"))]
    phones = rows[0][1:]
    return {frozenset((r[0], phones[c])): float(v) for r in rows[1:] for c, v in enumerate(r[1:])}


def miller_nicely_line(pair_value: dict[frozenset[str], float]) -> dict[str, float]:
    """Spearman's rho between a value per consonant pair and the table's confusion over its 120
    pairs, and the value's mean over the pairs by what they change."""
    table = miller_nicely_table()
    pairs = sorted(table, key=sorted)
    rho = float(np.corrcoef(rank([pair_value[p] for p in pairs]), rank([table[p] for p in pairs]))[0, 1])
    classes: dict[str, list[float]] = {}
    for p in pairs:
        classes.setdefault(kind(*sorted(p)), []).append(pair_value[p])
    return {"rho": rho} | {k: float(np.mean(v)) for k, v in classes.items()}


def symmetric_costs(model: CostModel) -> dict[frozenset[str], float]:
    return {p: (model.cost(*sorted(p)) + model.cost(*sorted(p, reverse=True))) / 2.0 for p in miller_nicely_table()}


def counted_rates(learned: Learned) -> dict[frozenset[str], float]:
    """Per pair, how often either phone was heard as the other, from the fit's own expected counts."""
    counts = learned.fit.counts.heard
    at = {phone: i for i, phone in enumerate(PHONES)}
    rates = {}
    for p in miller_nicely_table():
        a, b = (at[x] for x in sorted(p))
        rates[p] = float((counts[a, b] + counts[b, a]) / max(counts[a].sum() + counts[b].sum(), 1e-9))
    return rates


def paired(hand: dict[str, Outcome], other: list[Outcome]) -> tuple[int, int, float]:
    """Utterances whose entity set became right / wrong against the hand costs, and the two-sided
    sign-test p of that split (exact binomial, ties left out)."""
    better = sum(1 for o in other if o.entity_ok and not hand[o.id].entity_ok)
    worse = sum(1 for o in other if hand[o.id].entity_ok and not o.entity_ok)
    n = better + worse
    tail = sum(math.comb(n, k) for k in range(min(better, worse) + 1)) / 2.0 ** n if n else 1.0
    return better, worse, min(1.0, 2.0 * tail)


def main(argv: list[str] | None = None) -> int:
    defaults = LearnOptions()
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--focus", choices=("all", "errors", "entities"), default=defaults.focus)
    parser.add_argument("--hypotheses", type=int, default=defaults.hypotheses)
    parser.add_argument("--prior-weight", type=float, default=defaults.prior_weight)
    parser.add_argument("--scale", choices=("chance", "fit"), default=defaults.scale)
    parser.add_argument("--scenario", choices=SCENARIOS, action="append")
    parser.add_argument("--recogniser", choices=tuple(CORPORA), action="append")
    parser.add_argument("--json", type=Path, help="also write the rows as JSON")
    args = parser.parse_args(argv)
    options = LearnOptions(focus=args.focus, hypotheses=args.hypotheses, prior_weight=args.prior_weight,
                           scale=args.scale)
    rows: list[dict[str, Any]] = []
    rankings: list[dict[str, Any]] = []
    lines = [("hand costs", miller_nicely_line(symmetric_costs(CostModel.features())))]
    with tempfile.TemporaryDirectory() as tmp:
        cache, costs = Path(tmp) / "cache", Path(tmp)
        for scenario in args.scenario or SCENARIOS:
            folder = ROOT / "examples" / scenario
            other = ROOT / "examples" / next(s for s in SCENARIOS if s != scenario)
            for recogniser in args.recogniser or tuple(CORPORA):
                main_file, *rest = CORPORA[recogniser]
                train = read_corpus(folder / main_file)
                items = train + [i for name in rest if (folder / name).exists() for i in read_corpus(folder / name)]
                cross = costs / f"{scenario}-{recogniser}-cross.json"
                crossed = fit(read_corpus(other / main_file), other, options, cross)
                lines += [(f"{other.name} {recogniser} costs", miller_nicely_line(symmetric_costs(crossed.model))),
                          (f"{other.name} {recogniser} counted", miller_nicely_line(counted_rates(crossed)))]
                misheard = Misheard(folder, train)
                placed = {"hand": misheard.ranks(CostModel.features()), "cross": misheard.ranks(crossed.model)}
                outcomes: dict[str, list[tuple[CorpusItem, Outcome]]] = {}
                for name, path in (("hand", None), ("cross", cross)):
                    overrides = {"lexicon": {"match.costs": str(path)}} if path else {}
                    outcomes[name] = list(zip(items, run_corpus(chain_for(folder, overrides, cache), items)))
                outcomes["held out"], placed["held out"] = [], []
                for parity in (0, 1):
                    half = costs / f"{scenario}-{recogniser}-{parity}.json"
                    learned = fit([i for i in train if number(i) % 2 == parity], folder, options, half)
                    placed["held out"] += misheard.ranks(learned.model, {i.id for i in train if number(i) % 2 != parity})
                    chain = chain_for(folder, {"lexicon": {"match.costs": str(half)}}, cache)
                    tested = [i for i in items if number(i) % 2 != parity]
                    outcomes["held out"] += list(zip(tested, run_corpus(chain, tested)))
                for name, ranked in placed.items():
                    rankings.append({"scenario": scenario, "recogniser": recogniser, "costs": name,
                                     "mentions": len(ranked), "first": float(np.mean([r == 1 for r in ranked])),
                                     "top3": float(np.mean([r <= 3 for r in ranked])),
                                     "mrr": float(np.mean([1.0 / r for r in ranked]))})
                by_id = {o.id: o for _, o in outcomes["hand"]}
                for name, pairs in outcomes.items():
                    parts: dict[str, list[Outcome]] = {}
                    for item, outcome in pairs:
                        parts.setdefault(part_of(item), []).append(outcome)
                    for part in sorted(parts, key=lambda p: (p != "main", p)):
                        better, worse, p_value = paired(by_id, parts[part])
                        rows.append({"scenario": scenario, "recogniser": recogniser, "part": part, "costs": name}
                                    | row(parts[part]) | {"better": better, "worse": worse, "sign_p": p_value})
    print(f"focus {options.focus}, {options.hypotheses} hypotheses, prior weight {options.prior_weight}, "
          f"scale {options.scale}")
    print(f"{'scenario':9} {'recogniser':12} {'part':5} {'costs':8} {'n':>4} {'1st':>6} {'rehear':>6} "
          f"{'recall':>6} {'prec':>6} {'asked':>6} {'wrongA':>6}  entity sets right +/- vs hand (sign test p)")
    for r in sorted(rows, key=lambda r: (r["scenario"], r["recogniser"], r["part"] != "main", r["part"])):
        change = f"+{r['better']}/-{r['worse']} (p {r['sign_p']:.2f})" if r["costs"] != "hand" else ""
        print(f"{r['scenario']:9} {r['recogniser']:12} {r['part']:5} {r['costs']:8} {r['n']:4d} {r['wer_first']:6.1%} "
              f"{r['wer']:6.1%} {r['recall']:6.3f} {r['precision']:6.3f} {r['asked']:6.1%} {r['wrong_accepts']:6.1%}  "
              f"{change}")
    print("\nMisheard entity mentions of the first hypothesis (main corpus file), every lexicon entry ranked by "
          "phone similarity to the heard words: share where the meant entry comes first, in the top 3, mean 1/rank")
    for r in rankings:
        print(f"  {r['scenario']:9} {r['recogniser']:12} {r['costs']:8} {r['mentions']:4d}  first {r['first']:.3f}  "
              f"top 3 {r['top3']:.3f}  MRR {r['mrr']:.3f}")
    print("\nMiller & Nicely (1955) consonants: Spearman rho against the table's confusions over 120 pairs "
          "(costs: negative agrees; counted confusion rates: positive agrees), and the mean by what a pair changes "
          "(the table's order, most confused first: place only, place and manner, voicing only, voicing, nasality)")
    order = ("place only", "place and manner", "voicing only", "voicing", "nasality")
    for name, line in lines:
        scale = 100.0 if name.endswith("counted") else 1.0  # rates in percent
        print(f"  {name:32} rho {line['rho']:+.2f}   " + "   ".join(f"{k} {scale * line[k]:.2f}" for k in order))
    if args.json is not None:
        args.json.write_text(json.dumps({"options": vars(args) | {"json": str(args.json)}, "rows": rows,
                                         "rankings": rankings, "miller_nicely": dict(lines)}, indent=1, default=str))
    return 0


if __name__ == "__main__":
    sys.exit(main())

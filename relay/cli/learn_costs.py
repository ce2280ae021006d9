"""`rehear learn-costs CORPUS --lexicon L -o costs.json`: learn a recogniser's phone
confusions from a labelled corpus and write phone costs for the lexicon stage."""

from __future__ import annotations

import argparse
import datetime
import math
from pathlib import Path
from typing import Any

from relay import __version__
from relay.cli.common import output_file
from relay.cli.corpus_args import tag_filter
from relay.core.errors import InputError
from relay.workbench.confusions import LearnOptions, confusion_summary, counts_table, learn
from relay.workbench.corpus import read_corpus
from stages.lexicon.data import read_lexicon
from stages.lexicon.sound.costfile import write_costs

__all__ = ["add_parser", "run"]

HELP = "learn the recogniser's phone confusions from a labelled corpus (phone costs for the lexicon stage)"
DESCRIPTION = """\
Learn how a recogniser mishears phones, from a labelled corpus of its output (docs/formats.md
section 5: reference, entities with their text, the recogniser's N-best), and write phone costs that
the lexicon stage uses instead of its hand-set ones when its setting match.costs names the file:

    stages:
      - lexicon: {match: {costs: sounds.json}}

The reference words and the heard words are pronounced as the lexicon stage pronounces them
(CMUdict, the G2P model; an entity's words as the lexicon entry's form, `say` included) and
aligned word by word; each misheard stretch is then aligned phone by phone, and EM estimates
P(heard phone | said phone), phone deletions and insertions. The hand costs act as a prior
(--prior-weight pseudo-observations per phone), so phones the corpus rarely shows keep costs
near the hand ones. The costs are the log-odds against hearing a phone right, scaled to the
aligner's 0..1 range.

Fit on the recogniser you deploy, on a corpus you will not evaluate on; measured gains and
losses are in stages/lexicon/README.md ("Learned costs"). One recogniser per file: a corpus
that mixes recogniser tags is refused unless --where picks one.
"""


def _positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        value = 0
    if value < 1:
        raise argparse.ArgumentTypeError(f"{text!r}: give a whole number of at least 1")
    return value


def _weight(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        value = -1.0
    if not math.isfinite(value) or value < 0:
        raise argparse.ArgumentTypeError(f"{text!r}: give a number of pseudo-observations, 0 or more")
    return value


def add_parser(subparsers: Any) -> argparse.ArgumentParser:
    defaults = LearnOptions()
    parser: argparse.ArgumentParser = subparsers.add_parser(
        "learn-costs", help=HELP, description=DESCRIPTION, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("corpus", nargs="+", type=Path, metavar="CORPUS",
                        help="labelled corpus files, JSON Lines (docs/formats.md section 5), all from one recogniser")
    parser.add_argument("--lexicon", type=Path, required=True, metavar="L",
                        help="the lexicon the stage will use: entity words are pronounced as its forms")
    parser.add_argument("-o", "--output", type=output_file, required=True, metavar="COSTS.json",
                        help="phone cost file to write")
    parser.add_argument("--where", type=tag_filter, action="append", default=[], metavar="TAG=V|TAG!=V",
                        help="keep corpus lines whose tag matches, e.g. recogniser=whisper or split=seen (repeatable)")
    parser.add_argument("--hypotheses", type=_positive_int, default=defaults.hypotheses, metavar="N",
                        help="distinct hypotheses read per utterance, rank r weighted 1/(r+1), each utterance "
                        "counting once in all (default %(default)s: the first only)")
    parser.add_argument("--focus", choices=("all", "errors", "entities"), default=defaults.focus,
                        help="what teaches the costs: every word (also how often each phone is heard right), "
                        "only misheard stretches, or only the stretches holding entity words (default %(default)s)")
    parser.add_argument("--prior-weight", type=_weight, default=defaults.prior_weight, metavar="W",
                        help="pseudo-observations per said phone drawn from the hand costs (default %(default)s)")
    parser.add_argument("--scale", choices=("chance", "fit"), default=defaults.scale,
                        help="units of the costs: chance keeps unrelated phone strings as far apart as the hand "
                        "costs put them, so the stage's floors keep their meaning; fit uses the nats per unit at "
                        "which the hand costs explain the corpus best (default %(default)s)")
    parser.add_argument("--iterations", type=_positive_int, default=defaults.iterations, metavar="K",
                        help="EM iterations (default %(default)s)")
    parser.set_defaults(handler=run)
    return parser


def run(args: argparse.Namespace) -> int:
    entries = {entry.id: entry for entry in read_lexicon(args.lexicon)}
    items = [item for path in args.corpus for item in read_corpus(path)]
    kept = [item for item in items if all(f(item) for f in args.where)]
    if not kept:
        described = " and ".join(str(f) for f in args.where)
        raise InputError("corpus", f"no line of {', '.join(map(str, args.corpus))} matches {described}")
    # A line without the tag counts as one more recogniser: mixing it with tagged lines is refused too.
    recognisers = sorted({str(item.tags.get("recogniser") or "null") for item in kept})
    if len(recognisers) > 1:
        raise InputError("corpus", f"the lines come from several recognisers ({', '.join(recognisers)}); "
                         f"learn one at a time, e.g. --where recogniser={recognisers[0]}")
    recogniser = None if recognisers[0] == "null" else recognisers[0]
    options = LearnOptions(hypotheses=args.hypotheses, focus=args.focus, prior_weight=args.prior_weight,
                           iterations=args.iterations, scale=args.scale)
    learned = learn(kept, entries, options=options)
    tally = learned.tally
    provenance = {
        "corpus": [str(path) for path in args.corpus], "where": [str(f) for f in args.where],
        "recogniser": recogniser, "lexicon": str(args.lexicon), "utterances": tally.utterances,
        "hypotheses_per_utterance": options.hypotheses, "focus": options.focus,
        "prior_weight": options.prior_weight, "scale": options.scale,
        "nats_per_unit_cost": round(learned.scale, 4), "nats_per_unit_cost_fitted": round(learned.fit.scale, 4),
        "iterations": options.iterations, "log_likelihood": [round(v, 2) for v in learned.fit.log_likelihood],
        "stretches_aligned": tally.stretches, "stretches_too_long": tally.too_long,
        "entity_mentions": tally.entities, "entity_mentions_not_in_reference": tally.entities_missing,
        "counts": counts_table(learned), "created": datetime.date.today().isoformat(), "rehear": __version__,
    }
    try:
        write_costs(args.output, learned.model, provenance)
    except OSError as exc:
        raise InputError("output", f"{args.output}: cannot write ({exc.strerror or exc})") from None
    named = f"recogniser {recogniser}" if recogniser else "a recogniser the corpus does not name (no recogniser tag)"
    print(f"{tally.utterances} utterances of {named}, {tally.hypotheses} hypotheses: "
          f"{tally.stretches} misheard stretches aligned ({tally.too_long} too long, left out), "
          f"{tally.heard_right:.0f} phones heard right")
    print(f"costs in units of {learned.scale:.2f} nats ({options.scale}; the hand costs fit at "
          f"{learned.fit.scale:.2f}); log-likelihood "
          f"{learned.fit.log_likelihood[0]:.1f} -> {learned.fit.log_likelihood[-1]:.1f} over {options.iterations} "
          "EM iterations")
    print("most frequent confusions   count   hand  learned")
    for said, heard, count, hand, cost in confusion_summary(learned, top=10):
        print(f"  {said:>3} heard as {heard:<3}  {count:9.1f}  {hand:5.2f}  {cost:7.2f}")
    print(f"wrote {args.output}")
    return 0

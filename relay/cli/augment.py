"""`rehear augment`: turn the recogniser's near misses in a labelled corpus into extra NLU
training data and lexicon alias suggestions."""

from __future__ import annotations

import argparse
import csv
import io
from collections import Counter
from pathlib import Path

import orjson

from relay.cli.common import output_file
from relay.workbench.corpus import check_entity_ids, read_corpus
from relay.workbench.nearmiss import alias_suggestions, find_near_misses, training_examples
from relay.workbench.written import write_atomically
from stages.lexicon.data import read_lexicon

HELP = "turn near misses in a labelled corpus into extra NLU training data"
DESCRIPTION = """\
Finds where the recogniser heard a lexicon term as other words while getting the rest of the
utterance (nearly) right, in the first --depth distinct hypotheses of each corpus line. Writes
one JSON Lines training example per distinct heard text, with the misheard words labelled as
the entity they stand for ({text, entities: [{id, type, value, span, heard}], source,
reference}), so the NLU learns the recogniser's habits. --aliases writes the mishearings seen
at least --min-count times as `id,heard,count` rows to review before adding them to the
lexicon's aliases (an alias is taken as an exact match, so add only unambiguous ones).
"""


def add_parser(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = subparsers.add_parser("augment", help=HELP, description=DESCRIPTION,
                                   formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("corpus", type=Path,
                        help="labelled corpus, JSON Lines (docs/formats.md section 5; entities with their text)")
    parser.add_argument("--lexicon", type=Path, required=True, help="lexicon giving each id its type and name")
    parser.add_argument("-o", "--output", type=output_file, required=True,
                        help="training examples to write (JSON Lines)")
    parser.add_argument("--aliases", type=output_file, help="also write alias suggestions (CSV)")
    parser.add_argument("--depth", type=int, default=3, help="distinct hypotheses looked at per utterance (default 3)")
    parser.add_argument("--max-context-error", type=float, default=0.25,
                        help="largest word error rate allowed outside the entities (default 0.25)")
    parser.add_argument("--min-count", type=int, default=2, help="least sightings for an alias suggestion (default 2)")
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    lexicon = {entry.id: entry for entry in read_lexicon(args.lexicon)}
    items = read_corpus(args.corpus)
    check_entity_ids(items, set(lexicon), args.lexicon)
    misses, examples = find_near_misses(items, depth=args.depth, max_context_error=args.max_context_error)
    records = training_examples(examples, lexicon)
    write_atomically(args.output, b"".join(orjson.dumps(r) + b"\n" for r in records))
    print(f"{len(misses)} near misses in {len({m.utterance for m in misses})} of {len(items)} utterances; "
          f"wrote {len(records)} training examples to {args.output}")
    by_entity = Counter(miss.entity for miss in misses)
    for entity, count in by_entity.most_common(5):
        heard = Counter(m.heard for m in misses if m.entity == entity).most_common(2)
        shown = "; ".join(f'"{h}" x{n}' for h, n in heard)
        print(f"  {entity:<32} {count:>3}  e.g. {shown}")
    if args.aliases is not None:
        rows = alias_suggestions(misses, min_count=args.min_count)
        table = io.StringIO(newline="")
        writer = csv.writer(table)
        writer.writerow(["id", "heard", "count"])
        writer.writerows(rows)
        write_atomically(args.aliases, table.getvalue().encode("utf-8"))
        print(f"wrote {len(rows)} alias suggestions to {args.aliases}")
    return 0

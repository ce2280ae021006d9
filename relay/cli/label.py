"""`rehear label`: turn captured or logged recogniser messages into a labelled corpus, at the keyboard."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Any

from relay.cli.common import delegate, output_file
from relay.cli.corpus_args import chain_lexicon
from relay.core.config import build_chain, load_config
from relay.core.errors import ConfigError
from relay.workbench.label import Tally, label, read_pending
from relay.workbench.terminal import Keyboard
from stages.lexicon.data import read_lexicon

__all__ = ["add_parser", "run"]

HELP = "label captured or logged recogniser messages at the keyboard: the corpus eval and tune read"
DESCRIPTION = """\
Walk through recogniser messages one at a time and write the labelled corpus that `rehear
eval` and `rehear tune` read (docs/formats.md section 5). MESSAGES are capture files written
by the relay (its capture: section; a capture directory will do), or JSON Lines with one
recogniser message per line (docs/formats.md section 1), e.g. your recogniser's own log.

For each message you see its N-best list and what the chain of --config makes of it now (the
text it would send on, the decision, the rule and confidence behind it), then press

    a        rehear's words are what was said
    1-9      that hypothesis is (you may correct it before Enter)
    e        type the words said (the line starts with rehear's; Ctrl-U clears it)
    s        skip this message (noted in OUTPUT.skipped, not asked again)
    q        stop; everything answered so far is already in OUTPUT

Entities are then proposed from the lexicon against the words: y keeps them, n says there are
none, i lets you type the ids. Each answer is appended to OUTPUT at once; run the same command
again to go on where you stopped. Messages with an id already labelled are not asked twice.
"""


def add_parser(subparsers: Any) -> argparse.ArgumentParser:
    parser: argparse.ArgumentParser = subparsers.add_parser("label", help=HELP, description=DESCRIPTION)
    parser.add_argument("messages", nargs="+", type=Path, metavar="MESSAGES",
                        help="capture files or directories, or JSON Lines of recogniser messages")
    parser.add_argument("--config", type=Path, required=True, help="the relay configuration whose chain proposes")
    parser.add_argument("--lexicon", type=Path, metavar="L",
                        help="lexicon the entities are proposed from (default: the configuration's)")
    parser.add_argument("-o", "--output", type=output_file, required=True, metavar="CORPUS.jsonl",
                        help="labelled corpus to append to")
    parser.set_defaults(handler=run)
    return parser


def _lexicon(args: argparse.Namespace, chain: Any, domain_lexicon: Path | None) -> Path:
    if args.lexicon is not None:
        return Path(args.lexicon)
    path = chain_lexicon(chain.stages, domain_lexicon)
    if path is not None:
        return path
    raise ConfigError(f"{args.config} names no lexicon; give --lexicon")


def run(args: argparse.Namespace) -> int:
    if not sys.stdin.isatty():
        raise ConfigError("label asks at the keyboard: run it in a terminal (standard input is not one)")
    loaded = load_config(args.config)
    chain = build_chain(loaded, progress=sys.stderr.isatty())
    entries = read_lexicon(_lexicon(args, chain, loaded.domain.lexicon))
    read = Tally()
    items = list(read_pending(args.messages, field_map=loaded.config.fields, tally=read))
    if not items:
        raise ConfigError(f"no recogniser message to label in {', '.join(map(str, args.messages))}")
    print(f"loading the chain of {args.config} ...", flush=True)
    chain.load()
    done = label(items, chain=chain, entries=entries, output=args.output, keyboard=Keyboard(), out=sys.stdout,
                 field_map=loaded.config.fields)
    print(f"\nlabelled {done.accepted + done.corrected} ({done.accepted} as rehear had them, {done.corrected} "
          f"corrected), skipped {done.skipped}, {done.left} left for next time; "
          f"{read.unreadable} passed over (dead letters, partial results)")
    print(f"corpus: {args.output}   next: rehear tune {args.output} --config {args.config} -o tuned.yaml")
    return 0


def main(argv: list[str] | None = None) -> int:
    return delegate("label", argv)


if __name__ == "__main__":
    sys.exit(main())

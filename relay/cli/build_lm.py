"""`rehear build-lm`: estimate an n-gram language model from in-domain text and write ARPA."""

from __future__ import annotations

import argparse
import shutil
import sys
import time
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from relay.cli.common import delegate, output_file
from relay.core.errors import ConfigError
from relay.workbench.build_lm import build_model, write_binary
from stages.indomain.text import TextOptions
from stages.lm.kneser_ney import DEFAULT_FALLBACK

__all__ = ["add_parser", "main", "run"]

_DESCRIPTION = """\
Estimate an interpolated modified Kneser-Ney language model from in-domain text and write it
as an ARPA file that the lm_rescore stage (or any kenlm reader) loads.

Input is plain text (one utterance per line), or CSV / JSON Lines with a "text" column
(chosen by the .csv / .jsonl extension, or by --format). A line may hold {type} slots, filled
from the --lexicon entries of that type (names and aliases); a line expands to at most
--max-expansions combinations, picked with a fixed --seed. Text goes through the same
tokeniser as the recogniser's hypotheses at run time, unless --raw.

The model is written to a temporary file and renamed, so a failed run leaves nothing behind,
with the permissions of the process's umask (a relay running as another user can read it).
--binary also writes kenlm's binary form, which loads several times faster than ARPA; it needs
kenlm's build_binary program (built with kenlm from its source; the pip package has none).
"""


def _order(value: str) -> int:
    number = int(value)
    if number < 2:
        # kenlm, which loads the model at run time, reads bigram models and up
        raise argparse.ArgumentTypeError(f"must be at least 2, got {number}")
    return number


def _positive(value: str) -> int:
    number = int(value)
    if number < 1:
        raise argparse.ArgumentTypeError(f"must be at least 1, got {number}")
    return number


def _configure(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("text", nargs="+", type=Path, metavar="TEXT", help="in-domain text files")
    parser.add_argument("-o", "--output", required=True, type=output_file, metavar="MODEL.arpa",
                        help="where to write the ARPA model")
    parser.add_argument("--binary", type=output_file, metavar="MODEL.bin",
                        help="also write kenlm's binary form here (name it in domain.language_model)")
    parser.add_argument("--build-binary", default="build_binary", metavar="PROGRAM",
                        help="kenlm's build_binary program, for --binary (default: %(default)s, found on PATH)")
    parser.add_argument("--order", type=_order, default=3, metavar="N",
                        help="n-gram order (default: 3; in-domain command text rarely gains from more)")
    parser.add_argument("--lexicon", type=Path, metavar="L",
                        help="lexicon (CSV, YAML or JSON) whose entries fill {type} slots")
    parser.add_argument("--raw", action="store_true",
                        help="take whitespace-separated tokens exactly as written (text normalised elsewhere)")
    parser.add_argument("--format", dest="text_format", choices=["auto", "plain", "csv", "jsonl"], default="auto",
                        help="input format (default: by file extension)")
    parser.add_argument("--max-expansions", type=_positive, default=20, metavar="K",
                        help="slot combinations kept per line (default: 20)")
    parser.add_argument("--seed", type=int, default=0, help="seed for picking slot combinations (default: 0)")
    parser.add_argument("--max-line-chars", type=_positive, default=10_000, metavar="C",
                        help="reject longer lines (default: 10000)")
    parser.add_argument("--fallback-discounts", type=float, nargs=3, default=list(DEFAULT_FALLBACK),
                        metavar=("D1", "D2", "D3"),
                        help="discounts for an order whose counts cannot give them (default: 0.5 1 1.5)")
    progress = parser.add_mutually_exclusive_group()
    progress.add_argument("--progress", dest="progress", action="store_true", default=None,
                          help="always draw a progress bar")
    progress.add_argument("--no-progress", dest="progress", action="store_false",
                          help="never draw a progress bar (default: on large input at a terminal)")


def add_parser(subparsers: Any) -> argparse.ArgumentParser:
    """Register `build-lm` on an argparse subparsers object."""
    parser: argparse.ArgumentParser = subparsers.add_parser(
        "build-lm", help="build an n-gram language model from in-domain text",
        description=_DESCRIPTION, formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    _configure(parser)
    parser.set_defaults(handler=run)
    return parser


def run(args: argparse.Namespace) -> int:
    """Build the model (and its binary form); errors raise and `rehear` prints them."""
    builder = None
    if args.binary is not None:
        builder = shutil.which(args.build_binary)
        if builder is None:
            raise ConfigError(f"--binary needs kenlm's build_binary program; {args.build_binary!r} is not found "
                              "(build kenlm from its source with cmake, then give --build-binary PATH)")
    began = time.perf_counter()
    options = TextOptions(
        raw=args.raw, text_format=args.text_format, max_line_chars=args.max_line_chars,
        max_expansions=args.max_expansions, seed=args.seed, progress=args.progress,
    )
    model = build_model(train=args.text, output=args.output, lexicon=args.lexicon, order=args.order,
                        options=options, fallback=args.fallback_discounts)
    if builder is not None:
        write_binary(args.output, args.binary, builder=builder)
        print(f"wrote {args.binary} (kenlm binary form)", file=sys.stderr)
    sizes = ", ".join(f"{len(level)} {k + 1}-grams" for k, level in enumerate(model.counts))
    print(f"wrote {args.output}: order {model.order}, {sizes} ({time.perf_counter() - began:.1f} s)",
          file=sys.stderr)
    return 0


def main(argv: Sequence[str] | None = None) -> int:
    return delegate("build-lm", None if argv is None else list(argv))


if __name__ == "__main__":
    sys.exit(main())

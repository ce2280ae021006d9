"""The `rehear` command line. The environment is read here, once, and passed down."""

from __future__ import annotations

import argparse
import importlib
import sys
from collections.abc import Sequence

from relay import __version__
from relay.core.errors import RehearError

__all__ = ["main"]

# Subcommand modules under relay.cli, in the order --help lists them.
_COMMANDS = ("run", "check", "stages", "demo", "build_lm", "eval", "tune", "learn_costs", "augment", "bench")

_DESCRIPTION = """\
rehear cleans a speech recogniser's N-best lists before they reach NLU: it rescores them
with an in-domain language model, corrects misheard domain terms against a lexicon by sound,
and gates the result (accept, confirm or ask again). Run `rehear COMMAND --help` for details.
"""


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="rehear", description=_DESCRIPTION, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("--version", action="version", version=f"rehear {__version__}")
    subparsers = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)
    for name in _COMMANDS:
        module = importlib.import_module(f"relay.cli.{name}")
        known = set(subparsers.choices)
        module.add_parser(subparsers)
        for added in set(subparsers.choices) - known:
            if subparsers.choices[added].get_default("handler") is None:
                subparsers.choices[added].set_defaults(handler=module.run)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        code: int = args.handler(args)
    except RehearError as exc:
        print(f"rehear {args.command}: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        return 130
    except BrokenPipeError:  # output piped into `head` and the like
        sys.stderr.close()
        return 0
    return code


if __name__ == "__main__":
    sys.exit(main())

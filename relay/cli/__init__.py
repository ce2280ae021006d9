"""The `rehear` command line. The environment is read here, once, and passed down."""

from __future__ import annotations

import argparse
import importlib
import sys
from collections.abc import Sequence

from relay import __version__
from relay.cli.common import EXIT_FAILED, EXIT_STATUS, CommandParser, describe_error
from relay.core.errors import RehearError

__all__ = ["build_parser", "main"]

# Subcommand modules under relay.cli, in the order --help lists them.
_COMMANDS = ("run", "check", "stages", "demo", "starter", "build_lm", "label", "eval", "tune", "learn_costs",
             "augment", "bench")

_DESCRIPTION = """\
rehear cleans a speech recogniser's N-best lists before they reach NLU: it rescores them
with an in-domain language model, corrects misheard domain terms against a lexicon by sound,
and gates the result (accept, confirm or ask again). Run `rehear COMMAND --help` for details.

The first hour with your own recogniser: `rehear starter` writes a configuration from your
lexicon and in-domain text, `rehear run` with `capture:` on (or your recogniser's logs) gives
messages, `rehear label` turns them into a labelled corpus, `rehear tune` fits the chain to it.
"""


def build_parser() -> argparse.ArgumentParser:
    parser = CommandParser(prog="rehear", description=_DESCRIPTION, epilog=EXIT_STATUS,
                           formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--version", action="version", version=f"rehear {__version__}")
    subparsers = parser.add_subparsers(dest="command", metavar="COMMAND", required=True, parser_class=CommandParser)
    for name in _COMMANDS:
        module = importlib.import_module(f"relay.cli.{name}")
        known = set(subparsers.choices)
        module.add_parser(subparsers)
        for added in set(subparsers.choices) - known:
            command = subparsers.choices[added]
            command.epilog = EXIT_STATUS
            command.formatter_class = argparse.RawDescriptionHelpFormatter
            if command.get_default("handler") is None:
                command.set_defaults(handler=module.run)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Run one command; errors print as `rehear COMMAND: ...` with the documented exit status."""
    parser = build_parser()
    args = parser.parse_args(argv)
    prefix = f"rehear {args.command}"
    try:
        code: int = args.handler(args)
    except RehearError as exc:
        print(f"{prefix}: {describe_error(exc)}", file=sys.stderr)
        return exc.exit_status
    except KeyboardInterrupt:
        return 130
    except BrokenPipeError:  # output piped into `head` and the like
        sys.stderr.close()
        return 0
    except OSError as exc:  # a disk that filled up, a file removed under the command
        where = f"{exc.filename}: " if exc.filename else ""
        print(f"{prefix}: {where}{exc.strerror or exc}", file=sys.stderr)
        return EXIT_FAILED
    return code


if __name__ == "__main__":
    sys.exit(main())

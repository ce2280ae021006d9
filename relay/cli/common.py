"""What every `rehear` command shares: exit statuses, the error prefix, output paths checked
before any work, progress bars only at a terminal, optional extras named when missing."""

from __future__ import annotations

import argparse
import importlib.util
import os
import sys
from pathlib import Path
from typing import NoReturn

from relay.core.errors import ConfigError, InputError, RehearError

__all__ = ["EXIT_FAILED", "EXIT_OK", "EXIT_STATUS", "EXIT_USAGE", "CommandParser", "delegate", "describe_error",
           "output_file", "require_extra", "show_progress", "unwritable"]

EXIT_OK = 0
EXIT_FAILED = 1  # the work failed on good input: a port taken, a broker never reached, a result missing
EXIT_USAGE = 2  # bad usage or input: arguments, configuration, data files, output paths

EXIT_STATUS = """\
exit status:
  0  done
  1  the work failed on good input (a port taken, a result that never came, a write that failed)
  2  bad usage or input: arguments, configuration, data files or output paths; the message
     starts with `rehear COMMAND:` and names the file and line"""


class CommandParser(argparse.ArgumentParser):
    """argparse with the project's prefix on usage errors: `rehear eval: argument --report: ...`."""

    def error(self, message: str) -> NoReturn:
        self.print_usage(sys.stderr)
        self.exit(EXIT_USAGE, f"{self.prog}: {message}\n")


def describe_error(error: RehearError) -> str:
    """The text after `rehear COMMAND: `; an InputError's detail already names file and line."""
    return error.detail if isinstance(error, InputError) else str(error)


def unwritable(path: Path) -> str | None:
    """Why ``path`` cannot be written, or None when it can (checked before any work is done)."""
    if path.is_dir():
        return "it is a directory"
    parent = path.parent
    if not parent.exists():
        return f"no directory {parent}"
    if not parent.is_dir():
        return f"{parent} is not a directory"
    if path.exists():
        if not os.access(path, os.W_OK):
            return "no permission to write it"
    elif not os.access(parent, os.W_OK | os.X_OK):
        return f"no permission to create files in {parent}"
    return None


def output_file(text: str) -> Path:
    """argparse type for a file the command will write: refused at once when it cannot be."""
    path = Path(text)
    problem = unwritable(path)
    if problem is not None:
        raise argparse.ArgumentTypeError(f"cannot write {text}: {problem}")
    return path


def show_progress(args: argparse.Namespace) -> bool:
    """Progress bars only on a terminal, and never with --no-progress."""
    return not getattr(args, "no_progress", False) and sys.stderr.isatty()


def require_extra(module: str, *, extra: str, feature: str) -> None:
    """ConfigError (exit 2, before any work) naming the extra to install when ``module`` is missing."""
    if importlib.util.find_spec(module) is None:
        raise ConfigError(f"{feature} needs {module}, which is not installed: pip install 'rehear[{extra}]'")


def delegate(verb: str, argv: list[str] | None) -> int:
    """`python -m relay.cli.VERB ...` behaves exactly as `rehear VERB ...`."""
    from relay.cli import main

    return main([verb, *(sys.argv[1:] if argv is None else argv)])

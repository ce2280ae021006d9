"""The keyboard, for `rehear label`: single keys without Enter, and a line to edit that starts
out holding the words to correct."""

from __future__ import annotations

import contextlib
import os
import sys
import termios
import tty
from collections.abc import Iterator
from typing import Any, TextIO

__all__ = ["Keyboard"]


class Keyboard:
    """Reads keys from a terminal on ``fd`` (stdin's by default); echo is off between keys."""

    def __init__(self, fd: int | None = None, out: TextIO | None = None) -> None:
        self.fd = sys.stdin.fileno() if fd is None else fd
        self.out = out or sys.stdout
        self._saved: list[Any] | None = None

    @contextlib.contextmanager
    def keys(self) -> Iterator[Keyboard]:
        """Single-key mode for the block; the terminal is restored whatever happens."""
        self._saved = termios.tcgetattr(self.fd)
        try:
            tty.setcbreak(self.fd)
            yield self
        finally:
            termios.tcsetattr(self.fd, termios.TCSADRAIN, self._saved)
            self._saved = None

    def key(self) -> str:
        """One key press ("" at end of input, "\\x04" for Ctrl-D)."""
        data = os.read(self.fd, 1)
        if not data:
            return ""
        if data[0] >= 0x80:  # the first byte of a UTF-8 character: read the rest of it
            need = 1 if data[0] < 0xE0 else 2 if data[0] < 0xF0 else 3
            data += os.read(self.fd, need)
        return data.decode("utf-8", "replace")

    def line(self, prompt: str, prefill: str = "") -> str:
        """A line typed in the terminal's own line mode, starting out as ``prefill`` (readline
        editing: arrows, Ctrl-U to clear). Raises EOFError on Ctrl-D."""
        saved = self._saved
        if saved is not None:
            termios.tcsetattr(self.fd, termios.TCSADRAIN, saved)
        try:
            try:
                import readline
            except ImportError:  # no readline: the words are shown above and typed afresh
                self.out.write(f"  (was: {prefill})\n")
                return input(prompt)
            readline.set_startup_hook(lambda: readline.insert_text(prefill))
            try:
                return input(prompt)
            finally:
                readline.set_startup_hook()
        finally:
            if saved is not None:
                tty.setcbreak(self.fd)

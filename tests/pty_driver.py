"""A command run in a pseudo-terminal, as a person at a keyboard runs it: its screen is read
until an expected text appears (each wait bounded), and keys are typed into it."""

from __future__ import annotations

import os
import re
import select
import subprocess
import time
from collections.abc import Sequence
from pathlib import Path

__all__ = ["Terminal"]

_ESCAPES = re.compile(rb"\x1b\[[0-9;?]*[A-Za-z]|\x1b[=>]|\r")


class Terminal:
    """``argv`` with its standard input, output and error on a new pseudo-terminal."""

    def __init__(self, argv: Sequence[str], *, cwd: Path, env: dict[str, str]) -> None:
        self.master, slave = os.openpty()
        self.process = subprocess.Popen(list(argv), cwd=cwd, env=env, stdin=slave, stdout=slave, stderr=slave,
                                        close_fds=True, start_new_session=True)
        os.close(slave)
        self.screen = b""  # everything shown so far, terminal escapes removed
        self._seen = 0  # how much of it the waits have consumed

    def _read(self, timeout: float) -> bool:
        ready, _, _ = select.select([self.master], [], [], timeout)
        if not ready:
            return False
        try:
            data = os.read(self.master, 65536)
        except OSError:  # the program ended and closed the terminal
            return False
        self.screen += _ESCAPES.sub(b"", data)
        return bool(data)

    def expect(self, pattern: str, *, timeout: float = 20.0) -> re.Match[str]:
        """Wait for ``pattern`` (a regex) in what was shown since the last match; AssertionError
        with the screen's tail after ``timeout`` seconds."""
        compiled = re.compile(pattern)
        end = time.monotonic() + timeout
        while True:
            text = self.screen[self._seen:].decode("utf-8", "replace")
            found = compiled.search(text)
            if found is not None:
                self._seen += len(text[:found.end()].encode("utf-8"))
                return found
            left = end - time.monotonic()
            if left <= 0 or (not self._read(min(left, 0.5)) and self.process.poll() is not None):
                raise AssertionError(f"{pattern!r} not shown within {timeout} s; screen ends:\n{text[-1500:]}")

    def type(self, keys: str) -> None:
        os.write(self.master, keys.encode("utf-8"))

    def finish(self, *, timeout: float = 30.0) -> tuple[int, str]:
        """Wait for the program to end (bounded); (exit status, all it showed)."""
        end = time.monotonic() + timeout
        while self.process.poll() is None and time.monotonic() < end:
            self._read(0.2)
        while self._read(0.05):
            pass
        if self.process.poll() is None:
            self.process.kill()
            self.process.wait(timeout=10)
            raise AssertionError(f"still running after {timeout} s:\n{self.screen[-1500:].decode('utf-8', 'replace')}")
        os.close(self.master)
        return int(self.process.returncode), self.screen.decode("utf-8", "replace")

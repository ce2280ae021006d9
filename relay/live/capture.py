"""Capture: what the relay receives and what it sent for it, as rotating, size-bounded JSON
Lines (docs/formats.md section 6), for `rehear label` to turn into a labelled corpus.

Off the hot path: the message loop only puts a tuple of references on a bounded queue (no
copy, no encoding); a writer thread encodes and writes. When the queue is full a record is
dropped and counted, never waited for, so a slow disk cannot slow the relay.
"""

from __future__ import annotations

import datetime
import logging
import queue
import re
import threading
import time
from collections.abc import Sequence
from pathlib import Path
from typing import IO, Any

import orjson

from relay.core.settings import CaptureSettings
from relay.live.routing import Outgoing

__all__ = ["CaptureWriter", "capture_files"]

_log = logging.getLogger("rehear.capture")
_NAME = re.compile(r"^capture-(\d{6})\.jsonl$")
_STOP = None
# A record's input and outputs are kept whole up to this many bytes each; past it the file would
# hold one huge line per hostile message, so only the size is written.
_MAX_PAYLOAD = 256 * 1024
_CLOSE_TIMEOUT_S = 10.0
_BATCH_S = 0.05

_Record = tuple[float, str, bytes, str, Sequence[Outgoing]]


def capture_files(directory: Path) -> list[Path]:
    """The capture files in ``directory``, oldest first."""
    if not directory.is_dir():
        return []
    return sorted(p for p in directory.iterdir() if _NAME.match(p.name))


def _body(payload: bytes) -> dict[str, Any]:
    """A payload as JSON when it is a JSON object, else as text (what a dead letter carried)."""
    if len(payload) > _MAX_PAYLOAD:
        return {"payload_bytes": len(payload)}
    try:
        value = orjson.loads(payload)
    except orjson.JSONDecodeError:
        return {"payload_text": payload.decode("utf-8", "replace")}
    return {"message": value} if isinstance(value, dict) else {"payload_text": payload.decode("utf-8", "replace")}


def encode_record(at: float, topic: str, payload: bytes, outcome: str, sent: Sequence[Outgoing]) -> bytes:
    """One capture line."""
    stamp = datetime.datetime.fromtimestamp(at, datetime.UTC).isoformat(timespec="milliseconds")
    record: dict[str, Any] = {"at": stamp.replace("+00:00", "Z"), "topic": topic, "outcome": outcome,
                              **_body(payload)}
    record["sent"] = [{"topic": o.topic, "kind": o.kind, **_body(o.payload)} for o in sent]
    return orjson.dumps(record) + b"\n"


class CaptureWriter:
    """Records handed over by the message loop, written by one thread into rotating files."""

    def __init__(self, settings: CaptureSettings, base_dir: Path, *, on_drop: Any = None,
                 on_write: Any = None) -> None:
        self.settings = settings
        self.directory = settings.directory if settings.directory.is_absolute() else base_dir / settings.directory
        self._queue: queue.Queue[_Record | None] = queue.Queue(maxsize=settings.queue)
        self._on_drop = on_drop
        self._on_write = on_write
        self._thread: threading.Thread | None = None
        self._handle: IO[bytes] | None = None
        self._size = 0
        self.dropped = 0
        self.written = 0

    def start(self) -> None:
        self.directory.mkdir(parents=True, exist_ok=True)
        self._thread = threading.Thread(target=self._drain, name="rehear-capture", daemon=True)
        self._thread.start()
        _log.info("capturing input and results", extra={"fields": {"directory": str(self.directory)}})

    def record(self, at: float, topic: str, payload: bytes, outcome: str, sent: Sequence[Outgoing]) -> None:
        """Hand one input and what was published for it to the writer; never blocks."""
        try:
            self._queue.put_nowait((at, topic, payload, outcome, sent))
        except queue.Full:
            self.dropped += 1
            if self._on_drop is not None:
                self._on_drop()

    def close(self) -> None:
        """Write what is queued, then stop (bounded: a stuck disk does not hold up shutdown)."""
        if self._thread is None:
            return
        try:
            self._queue.put(_STOP, timeout=_CLOSE_TIMEOUT_S)
        except queue.Full:
            _log.warning("capture queue still full at shutdown; its records are lost")
            return
        self._thread.join(timeout=_CLOSE_TIMEOUT_S)
        if self._thread.is_alive():
            _log.warning("capture writer did not finish within the shutdown bound")
        self._thread = None

    # ---- the writer thread ---------------------------------------------------------------

    def _drain(self) -> None:
        try:
            while True:
                item = self._queue.get()
                if item is not _STOP:
                    # Let records gather, then write them in one go: the thread takes the
                    # interpreter lock once per batch instead of once per message, so it seldom
                    # competes with the event loop and the chain's worker; a record is in the
                    # file at most this long after its message was acknowledged.
                    time.sleep(_BATCH_S)
                while item is not _STOP:
                    self._write_one(item)
                    try:
                        item = self._queue.get_nowait()
                    except queue.Empty:
                        break
                if self._handle is not None:
                    self._handle.flush()
                if item is _STOP:
                    return
        finally:
            if self._handle is not None:
                self._handle.close()
                self._handle = None

    def _write_one(self, item: _Record) -> None:
        try:
            self._write(encode_record(*item))
        except OSError as exc:  # a full or read-only disk: the relay goes on, the log says why
            self.dropped += 1
            if self._on_drop is not None:
                self._on_drop()
            _log.error("cannot write a capture record", extra={"fields": {"error": str(exc)}})

    def _write(self, line: bytes) -> None:
        handle = self._handle
        if handle is None or (self._size and self._size + len(line) > self.settings.max_file_bytes):
            handle = self._rotate()
        handle.write(line)
        self._size += len(line)
        self.written += 1
        if self._on_write is not None:
            self._on_write()

    def _rotate(self) -> IO[bytes]:
        """Close the current file and begin the next one, removing the oldest past max_files."""
        if self._handle is not None:
            self._handle.close()
        existing = capture_files(self.directory)
        last = _NAME.match(existing[-1].name) if existing else None
        number = int(last.group(1)) + 1 if last else 1
        for old in existing[: max(0, len(existing) - self.settings.max_files + 1)]:
            old.unlink(missing_ok=True)
        path = self.directory / f"capture-{number:06d}.jsonl"
        self._handle = handle = path.open("ab")
        self._size = 0
        return handle

"""Worker processes that run the stage chain, so that every core works on messages.

One relay process runs its chain on one core at a time (the interpreter lock). With
``limits.chain_runner: process`` the relay forks ``limits.chain_processes`` workers (default:
one per core) from itself once the chain is loaded: each worker inherits the loaded chain
copy-on-write (the lexicon and the language model are loaded once, by the relay, and their
pages shared), reads pickled utterances from a pipe, runs the chain, renders the result and
sends the rendered bytes back (relay.live.routing.Rendered: the relay only stamps and publishes).

- Order: the relay acknowledges in arrival order whatever order results come back in
  (relay.live.transport), so workers may finish in any order.
- Deadline: as with the thread runner, a loop timer makes ``run`` raise TimeoutError when the
  deadline passes, so the original goes on however late a worker is; a worker skips a job that
  is already late when it reads it, and a late result is dropped.
- A worker that dies (killed, a crash in compiled code) fails the jobs it held with StageError:
  their originals go on flagged ``stage_error``, none is lost, and a new worker is forked.
- Balance: a message goes to the worker holding the fewest; one stuck on a message keeps it
  (late or not) in its count, so the others take the new ones.
- Reload: workers serve the chain they were forked with. The first message on a new chain
  forks workers for it; the old chain's workers exit once their last job is back.
"""

from __future__ import annotations

import asyncio
import contextlib
import itertools
import logging
import os
import pickle
import signal
import stat
import struct
import time
import traceback
from collections.abc import Iterator
from typing import Any

from relay.core.chain import Chain
from relay.core.errors import DeadlineExceeded, StageError
from relay.core.utterance import Utterance
from relay.live.routing import Rendered, RenderError, render

__all__ = ["ProcessRunner", "default_processes"]

_log = logging.getLogger("rehear.service")
_HEADER = struct.Struct("<I")  # the byte length of the pickle that follows
_REAP_S = 2.0  # how long a worker asked to stop may take before it is killed


def default_processes() -> int:
    """One worker per core this process may run on."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover - not on Linux
        return max(1, os.cpu_count() or 1)


class _Results(asyncio.Protocol):
    """Frames coming back from one worker; the end of the pipe means the worker is gone."""

    def __init__(self, pool: _Pool, worker: _Worker) -> None:
        self._pool = pool
        self._worker = worker
        self._buffer = bytearray()

    def data_received(self, data: bytes) -> None:
        buffer = self._buffer
        buffer += data
        while len(buffer) >= _HEADER.size:
            (size,) = _HEADER.unpack_from(buffer)
            if len(buffer) < _HEADER.size + size:
                break
            frame = bytes(buffer[_HEADER.size:_HEADER.size + size])
            del buffer[:_HEADER.size + size]
            self._pool.deliver(self._worker, frame)

    def connection_lost(self, exc: Exception | None) -> None:
        self._pool.lost(self._worker)


class _Worker:
    __slots__ = ("held", "jobs", "pending", "pid")

    def __init__(self, pid: int) -> None:
        self.pid = pid
        self.jobs: asyncio.WriteTransport | None = None
        self.pending: dict[int, asyncio.Future[tuple[Rendered, float, float]]] = {}
        # Jobs sent and not answered yet, late ones included: a worker stuck on a message keeps
        # its count, so new messages go to the others.
        self.held = 0


class _Pool:
    """The workers forked for one chain."""

    def __init__(self, chain: Chain, processes: int) -> None:
        self.chain: Chain | None = chain
        self.processes = processes
        self.workers: list[_Worker] = []
        self.closed = False
        self._numbers: Iterator[int] = itertools.count()
        self._ready: asyncio.Task[None] | None = None
        self._spawning: set[asyncio.Task[None]] = set()

    async def run(self, utterance: Utterance, deadline: float, relay: dict[str, Any],
                  forward_unsure: bool) -> tuple[Rendered, float, float]:
        if self._ready is None:
            self._ready = asyncio.ensure_future(self._start())
        await asyncio.shield(self._ready)
        while not self.workers:  # every worker died at once: wait for a replacement
            if self.closed:
                raise StageError("chain", "the chain's worker processes were stopped")
            self._replace()
            if self._spawning:
                await asyncio.wait(set(self._spawning))
        number = next(self._numbers)
        data = pickle.dumps((number, deadline, utterance, relay, forward_unsure), protocol=pickle.HIGHEST_PROTOCOL)
        worker = min(self.workers, key=lambda w: w.held)
        loop = asyncio.get_running_loop()
        future: asyncio.Future[tuple[Rendered, float, float]] = loop.create_future()
        worker.pending[number] = future
        if worker.jobs is not None:
            worker.held += 1
            worker.jobs.write(_HEADER.pack(len(data)) + data)
        timer = loop.call_later(max(0.0, deadline - time.monotonic()), _expire, future)
        try:
            return await future
        finally:
            timer.cancel()
            worker.pending.pop(number, None)

    async def _start(self) -> None:
        for _ in range(self.processes):
            self._replace()
        await asyncio.wait(set(self._spawning))

    def _replace(self) -> None:
        """Fork workers until there are ``processes`` of them, counting those being started."""
        while not self.closed and len(self.workers) + len(self._spawning) < self.processes:
            task = asyncio.ensure_future(self._spawn())
            self._spawning.add(task)
            task.add_done_callback(self._spawning.discard)

    async def _spawn(self) -> None:
        chain = self.chain
        if chain is None or self.closed:
            return
        jobs_read, jobs_write = os.pipe()
        results_read, results_write = os.pipe()
        pid = os.fork()
        if pid == 0:  # the worker: never returns
            code = 1
            try:
                _serve(chain, jobs_read, results_write)
                code = 0
            finally:
                os._exit(code)
        os.close(jobs_read)
        os.close(results_write)
        worker = _Worker(pid)
        loop = asyncio.get_running_loop()
        transport, _ = await loop.connect_write_pipe(asyncio.Protocol, os.fdopen(jobs_write, "wb", buffering=0))
        worker.jobs = transport
        await loop.connect_read_pipe(lambda: _Results(self, worker), os.fdopen(results_read, "rb", buffering=0))
        self.workers.append(worker)
        if self.closed:  # closed while this one was starting: it ends at once
            transport.close()

    def deliver(self, worker: _Worker, frame: bytes) -> None:
        number, status, value, started, ended = pickle.loads(frame)
        worker.held -= 1
        future = worker.pending.pop(number, None)
        if future is None or future.done():
            return  # its deadline passed meanwhile: the original has gone on
        if status == "ok":
            future.set_result((value, started, ended))
        elif status == "late":
            future.set_exception(TimeoutError())
        elif status == "deadline":
            future.set_exception(DeadlineExceeded(value[0], value[1], inside=True))
        elif status == "render":
            future.set_exception(RenderError(value))
        else:
            future.set_exception(StageError(value[0], value[1]))

    def lost(self, worker: _Worker) -> None:
        if worker in self.workers:
            self.workers.remove(worker)
        if worker.jobs is not None:
            worker.jobs.close()
        code = _reap(worker.pid, within_s=0.05)
        if code is None:
            _reap_soon(worker.pid)
        if worker.held or not self.closed:
            _log.error("a chain worker process exited; its messages go on flagged, a new worker takes its place",
                       extra={"fields": {"pid": worker.pid, "exit": code, "messages": worker.held}})
        for future in worker.pending.values():
            if not future.done():
                future.set_exception(StageError("chain", f"the worker process {worker.pid} running it exited ({code})"))
        worker.pending.clear()
        self._replace()

    def close(self) -> None:
        """No more jobs: each worker finishes the jobs sent to it (the pipe keeps them), reads the
        end of its pipe and exits; their results still come back."""
        self.closed = True
        self.chain = None  # the replaced chain can be freed here (relay.live.heap waits for that)
        for worker in self.workers:
            if worker.jobs is not None:
                worker.jobs.close()

    def pids(self) -> list[int]:
        return [worker.pid for worker in self.workers]


class ProcessRunner:
    """Runs chains in worker processes, one set of workers per chain: ``await run(chain, ...)``."""

    def __init__(self) -> None:
        self._current: _Pool | None = None
        self._retired: list[_Pool] = []

    async def run(self, chain: Chain, utterance: Utterance, deadline: float, relay: dict[str, Any], *,
                  forward_unsure: bool, processes: int | None = None) -> tuple[Rendered, float, float]:
        """The processed utterance rendered (``relay`` as its relay block), when the chain started
        on it and when the rendering ended (time.monotonic()); TimeoutError once ``deadline``
        passes, DeadlineExceeded or StageError as the chain raised, RenderError as rendering did."""
        pool = self._current
        if pool is None or pool.chain is not chain:
            # No await between the relay reading its active chain and this call: a chain seen here
            # that is not the current one is always the newer one (a reload swapped it in).
            if pool is not None:
                pool.close()
                self._retired.append(pool)
            self._retired = [p for p in self._retired if not p.closed or p.workers]
            pool = self._current = _Pool(chain, processes or default_processes())
        return await pool.run(utterance, deadline, relay, forward_unsure)

    def pids(self) -> list[int]:
        """The worker processes of the current chain."""
        return self._current.pids() if self._current is not None else []

    def shutdown(self) -> None:
        """Stop every worker: each ends after its current message; one still busy after a short
        wait is killed (the drain has already waited for the messages in flight)."""
        pools = [p for p in [self._current, *self._retired] if p is not None]
        self._current, self._retired = None, []
        for pool in pools:
            pool.close()
        pids = [pid for pool in pools for pid in pool.pids()]
        end = time.monotonic() + _REAP_S
        while pids and time.monotonic() < end:
            pids = [pid for pid in pids if _reap(pid) is None]
            if pids:
                time.sleep(0.02)
        for pid in pids:
            with contextlib.suppress(ProcessLookupError):
                os.kill(pid, signal.SIGKILL)
            _reap(pid, wait=True)


def _reap(pid: int, *, wait: bool = False, within_s: float = 0.0) -> str | None:
    """How the worker ended ("code 0", "signal 9"), or None while it runs; ``within_s``: poll
    that long (a worker whose pipe just closed is about to be gone)."""
    end = time.monotonic() + within_s
    while True:
        try:
            done, status = os.waitpid(pid, 0 if wait else os.WNOHANG)
        except ChildProcessError:
            return "gone"
        if done:
            return f"signal {os.WTERMSIG(status)}" if os.WIFSIGNALED(status) else f"code {os.WEXITSTATUS(status)}"
        if time.monotonic() >= end:
            return None
        time.sleep(0.002)


def _reap_soon(pid: int, tries: int = 40) -> None:
    """Collect the worker's exit status within a few seconds, killing it if it lingers."""
    if _reap(pid) is not None:
        return
    if tries == 0:
        with contextlib.suppress(ProcessLookupError):
            os.kill(pid, signal.SIGKILL)
    asyncio.get_running_loop().call_later(0.1, _reap_soon, pid, max(0, tries - 1))


def _expire(future: asyncio.Future[Any]) -> None:
    if not future.done():
        future.set_exception(TimeoutError())


# ---- the worker process ----------------------------------------------------------------------

def _serve(chain: Chain, jobs: int, results: int) -> None:
    """Run the chain on every job until the relay closes the pipe."""
    for number in (signal.SIGINT, signal.SIGTERM, signal.SIGHUP):
        # The relay decides when its workers stop (after draining); a Ctrl-C or a service
        # manager's SIGTERM to the whole group must not end them mid-message.
        signal.signal(number, signal.SIG_IGN)
    with contextlib.suppress(ValueError):
        signal.set_wakeup_fd(-1)
    _close_inherited(keep={jobs, results})
    reader = os.fdopen(jobs, "rb")
    while True:
        header = reader.read(_HEADER.size)
        if len(header) < _HEADER.size:
            return  # the relay closed the pipe or is gone
        (size,) = _HEADER.unpack(header)
        number, deadline, utterance, relay, forward_unsure = pickle.loads(reader.read(size))
        started = time.monotonic()
        if started > deadline:
            reply: tuple[Any, ...] = (number, "late", None, started, started)
        else:
            try:
                done = render(chain.process(utterance, deadline=deadline), relay, forward_unsure=forward_unsure)
                reply = (number, "ok", done, started, time.monotonic())
            except RenderError as exc:
                reply = (number, "render", str(exc), started, time.monotonic())
            except DeadlineExceeded as exc:
                reply = (number, "deadline", (exc.stage, exc.elapsed_ms), started, time.monotonic())
            except Exception as exc:  # noqa: BLE001 - handed to the relay, which forwards the original
                stage = getattr(exc, "stage", None) or utterance.last_stage
                detail = "".join(traceback.format_exception(exc)).strip()
                reply = (number, "error", (stage, detail), started, time.monotonic())
        try:
            data = pickle.dumps(reply, protocol=pickle.HIGHEST_PROTOCOL)
        except Exception as exc:  # noqa: BLE001 - a value a stage left that cannot cross the pipe
            detail = f"the result cannot be sent back from the worker ({type(exc).__name__}: {exc})"
            data = pickle.dumps((number, "error", ("chain", detail), started, time.monotonic()))
        _write_all(results, _HEADER.pack(len(data)) + data)


def _write_all(fd: int, data: bytes) -> None:
    view = memoryview(data)
    while view:
        view = view[os.write(fd, view):]


def _close_inherited(keep: set[int]) -> None:
    """Close the sockets and pipes inherited from the relay: the broker connection, the metrics
    endpoint and other workers' pipes must close when the relay closes them, not stay open here.
    Regular files stay: a stage may still read a file it holds."""
    for name in os.listdir("/proc/self/fd"):
        fd = int(name)
        if fd < 3 or fd in keep:
            continue
        try:
            mode = os.fstat(fd).st_mode
        except OSError:
            continue
        if stat.S_ISSOCK(mode) or stat.S_ISFIFO(mode):
            with contextlib.suppress(OSError):
                os.close(fd)

"""The relay measured through a broker: a bare pass-through relay and the configured chain, in turns.

A broker is started on a free loopback port: mosquitto with ``set_tcp_nodelay true`` when it is
installed, else the embedded MQTT 3.1.1 broker (both relays then speak 3.1.1). Every relay
under test runs in a process of its own (``python -m relay.workbench.endtoend``) with the same
protocol, event loop, TCP_NODELAY and in-flight window, and this process drives it:

- throughput: ``messages`` inputs published at QoS 1 with up to twice the window unacknowledged;
  msg/s from the first publish to the last result, and the relay's CPU time per message (its
  own and its worker processes', from /proc);
- latency: ``latency_messages`` inputs paced at ``rate`` msg/s; publish -> result received.
"""

from __future__ import annotations

import argparse
import asyncio
import dataclasses
import os
import shutil
import socket
import statistics
import subprocess
import sys
import tempfile
import time
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import aiomqtt
import orjson

__all__ = ["NODELAY", "WINDOW", "Broker", "RelayRun", "bench_active", "broker", "free_port", "measure_relay",
           "serve_passthrough", "stop_process"]

NODELAY = [(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)]
WINDOW = 64  # in-flight messages in every relay under test (limits.max_in_flight)
_IN, _OUT = "bench/in/kiosk-1", "bench/out/#"


@dataclasses.dataclass(frozen=True, slots=True)
class Broker:
    port: int
    protocol: str  # "5" with mosquitto, "3.1.1" with the embedded broker
    kind: str  # mosquitto or embedded


@dataclasses.dataclass(frozen=True, slots=True)
class RelayRun:
    """One relay measured once."""

    msg_s: float
    cpu_us: float  # relay CPU per message, its worker processes included
    p50_ms: float
    p99_ms: float
    forwarded: int  # results of the throughput run that went on uncleaned (deadline, errors)
    pss_mb: float  # proportional set size of the relay and its workers (shared pages counted once)


def free_port() -> int:
    """A loopback TCP port nothing listens on now."""
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


def stop_process(process: subprocess.Popen[Any], timeout: float = 10.0) -> None:
    """SIGTERM, so the process can finish what it writes; SIGKILL when it has not exited within
    ``timeout`` seconds; then reap it."""
    process.terminate()
    try:
        process.wait(timeout=timeout)
    except subprocess.TimeoutExpired:
        process.kill()
        process.wait()


def _wait_port(port: int, timeout: float = 10.0) -> None:
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        try:
            with socket.create_connection(("127.0.0.1", port), timeout=0.2):
                return
        except OSError:
            time.sleep(0.05)
    raise RuntimeError(f"no broker answered on 127.0.0.1:{port} within {timeout:g} s")


@contextmanager
def broker(*, mosquitto: str | None = None, embedded: bool = False) -> Iterator[Broker]:
    """A broker on a free loopback port for the duration of the block."""
    binary = mosquitto or shutil.which("mosquitto") or ("/usr/sbin/mosquitto" if Path("/usr/sbin/mosquitto").exists()
                                                         else None)
    port = free_port()
    with tempfile.TemporaryDirectory(prefix="rehear-bench-") as folder:
        if binary and not embedded:
            conf = Path(folder) / "mosquitto.conf"
            conf.write_text(f"listener {port} 127.0.0.1\nallow_anonymous true\nset_tcp_nodelay true\n"
                            "max_inflight_messages 0\nmax_queued_messages 100000\n")
            process = subprocess.Popen([binary, "-c", str(conf)], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
            found = Broker(port, "5", "mosquitto")
        else:
            process = subprocess.Popen([sys.executable, "-m", "relay.workbench.endtoend", "broker", str(port)],
                                       stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
            found = Broker(port, "3.1.1", "embedded")
        try:
            _wait_port(port)
            yield found
        finally:
            stop_process(process)


# ---- the relays under test (each in a process of its own) -----------------------------------

async def serve_passthrough(port: int, protocol: str) -> None:
    """The baseline: subscribe, publish each payload on from its own task, QoS 1."""
    slots = asyncio.Semaphore(WINDOW)
    version = aiomqtt.ProtocolVersion.V5 if protocol == "5" else aiomqtt.ProtocolVersion.V311
    async with aiomqtt.Client("127.0.0.1", port, identifier=f"bench-pass-{time.time_ns()}", protocol=version,
                              socket_options=NODELAY) as client:
        client.pending_calls_threshold = 1000
        await client.subscribe("bench/in/#", qos=1)
        tasks: set[asyncio.Task[None]] = set()

        async def forward(payload: bytes) -> None:
            try:
                await client.publish("bench/out/kiosk-1", payload, qos=1)
            finally:
                slots.release()

        async for message in client.messages:
            await slots.acquire()
            task = asyncio.create_task(forward(bytes(message.payload)))
            tasks.add(task)
            task.add_done_callback(tasks.discard)


def bench_active(config: Path, port: int, protocol: str, runner: str | None) -> Any:
    """The configured chain, loaded, with broker, topics and limits set for the bench."""
    from relay.core.config import build_chain, load_config
    from relay.live.active import Active

    loaded = load_config(config)
    c = loaded.config
    limits = {"max_in_flight": WINDOW} | ({"chain_runner": runner} if runner else {})
    c = c.model_copy(update={
        "broker": c.broker.model_copy(update={"host": "127.0.0.1", "port": port, "protocol": protocol,
                                              "client_id": f"bench-chain-{time.time_ns()}", "tcp_nodelay": True,
                                              "username": None, "password": None, "password_file": None,
                                              "tls": c.broker.tls.model_copy(update={"enabled": False})}),
        # one result per input on the subscribed topic, whatever the gate decides
        "topics": c.topics.model_copy(update={
            "inputs": ["bench/in/+"], "output": "bench/out/{source}", "prompt": "bench/prompt/{source}",
            "dead_letter": "bench/dead", "input_qos": 1, "output_qos": 1, "forward_unsure": True}),
        "limits": c.limits.model_copy(update=limits),
        "metrics": c.metrics.model_copy(update={"enabled": False}),  # still counted, not served
    })
    loaded = dataclasses.replace(loaded, config=c)
    chain = build_chain(loaded)
    chain.load()
    return Active(loaded, chain)


def _warm(active: Any, messages: Path) -> None:
    """Every message through the chain once, before serving: the word caches (pronunciations,
    phonetic keys) filled as in a relay that has run a while, in this process and so in the
    workers it forks; otherwise the first pass pays for every new word (see relay/live/README.md)."""
    from relay.live.messages import parse_message
    from relay.workbench.benchdata import read_messages

    for payload in read_messages(messages):
        active.chain.process(parse_message(payload, topic=_IN, field_map=active.loaded.config.fields))


# ---- the driver -------------------------------------------------------------------------------

def _stamped(payloads: Sequence[bytes], count: int) -> list[tuple[str, bytes]]:
    """``count`` inputs cycling through ``payloads``, each with an id of its own and source kiosk-1."""
    out = []
    for number in range(count):
        message = orjson.loads(payloads[number % len(payloads)])
        ident = f"b-{number}"
        message.update(id=ident, source="kiosk-1")
        out.append((ident, orjson.dumps(message)))
    return out


async def _drive(port: int, protocol: str, inputs: list[tuple[str, bytes]], rate: float | None,
                 timeout: float) -> tuple[float, list[float], int]:
    """(msg/s, latencies in ms, results forwarded uncleaned)."""
    version = aiomqtt.ProtocolVersion.V5 if protocol == "5" else aiomqtt.ProtocolVersion.V311
    sent: dict[str, int] = {}
    latencies: list[float] = []
    forwarded = 0
    done = asyncio.Event()
    async with aiomqtt.Client("127.0.0.1", port, identifier=f"bench-sub-{time.time_ns()}", protocol=version,
                              socket_options=NODELAY) as sub:
        await sub.subscribe(_OUT, qos=1)

        async def collect() -> None:
            nonlocal forwarded
            async for message in sub.messages:
                now = time.perf_counter_ns()
                result = orjson.loads(message.payload)
                began = sent.pop(str(result.get("id")), None)
                if began is None:
                    continue  # a duplicate, or a late result of an earlier run
                latencies.append((now - began) / 1e6)
                forwarded += "passthrough" in (result.get("relay") or {})
                if not sent and len(latencies) == len(inputs):
                    done.set()

        collector = asyncio.create_task(collect())
        async with aiomqtt.Client("127.0.0.1", port, identifier=f"bench-pub-{time.time_ns()}", protocol=version,
                                  socket_options=NODELAY) as pub:
            pub.pending_calls_threshold = 1000
            window = asyncio.Semaphore(2 * WINDOW)
            start = time.perf_counter()

            async def send(ident: str, payload: bytes) -> None:
                try:
                    sent[ident] = time.perf_counter_ns()
                    await pub.publish(_IN, payload, qos=1)
                finally:
                    window.release()

            tasks = []
            for index, (ident, payload) in enumerate(inputs):  # bounded: exactly len(inputs) messages
                if rate:
                    await asyncio.sleep(max(0.0, start + index / rate - time.perf_counter()))
                await window.acquire()
                tasks.append(asyncio.create_task(send(ident, payload)))
            await asyncio.gather(*tasks)
            await asyncio.wait_for(done.wait(), timeout=timeout)
            elapsed = time.perf_counter() - start
        collector.cancel()
    return len(inputs) / elapsed, latencies, forwarded


def _family(pid: int) -> list[int]:
    """``pid`` and its children (the chain's worker processes)."""
    found = []
    for entry in os.listdir("/proc"):
        if not entry.isdigit():
            continue
        try:
            fields = Path(f"/proc/{entry}/stat").read_text().rsplit(")", 1)[1].split()
        except OSError:
            continue
        if int(entry) == pid or int(fields[1]) == pid:
            found.append(int(entry))
    return found


def _cpu_seconds(pid: int) -> float:
    """User + system CPU of ``pid`` and of its children still running."""
    tick = os.sysconf("SC_CLK_TCK")
    total = 0.0
    for member in _family(pid):
        try:
            fields = Path(f"/proc/{member}/stat").read_text().rsplit(")", 1)[1].split()
        except OSError:
            continue
        total += (int(fields[11]) + int(fields[12])) / tick
    return total


def _pss_mb(pid: int) -> float:
    total = 0
    for member in _family(pid):
        try:
            lines = Path(f"/proc/{member}/smaps_rollup").read_text().splitlines()
        except OSError:
            continue
        total += sum(int(line.split()[1]) for line in lines if line.startswith("Pss:"))
    return round(total / 1024, 1)


def _percentile(values: Sequence[float], q: float) -> float:
    return statistics.quantiles(values, n=1000)[int(q * 1000) - 1] if len(values) > 1 else values[0]


def measure_relay(found: Broker, serve: list[str], payloads: Sequence[bytes], *, messages: int,
                  latency_messages: int, rate: float, event_loop: str, messages_file: Path | None = None
                  ) -> RelayRun:
    """Start one relay under test (``serve``: passthrough, or relay CONFIG RUNNER, which first runs
    the chain once over ``messages_file``), measure it, stop it."""
    extra = [str(messages_file)] if serve[0] == "relay" and messages_file is not None else []
    child = subprocess.Popen([sys.executable, "-m", "relay.workbench.endtoend", *serve, str(found.port),
                              found.protocol, event_loop, *extra], stdout=subprocess.PIPE,
                             stderr=subprocess.DEVNULL)
    try:
        ready = child.stdout.readline() if child.stdout is not None else b""
        if not ready.startswith(b"ready"):
            raise RuntimeError(f"the relay under test ({' '.join(serve)}) did not start (exit {child.poll()})")
        time.sleep(0.3)  # connect and subscribe
        warm = _stamped(payloads, min(200, messages))
        asyncio.run(_drive(found.port, found.protocol, warm, None, 60))
        cpu = _cpu_seconds(child.pid)
        throughput, _, forwarded = asyncio.run(_drive(found.port, found.protocol, _stamped(payloads, messages),
                                                      None, 60 + messages / 50))
        cpu = _cpu_seconds(child.pid) - cpu
        pss = _pss_mb(child.pid)
        _, latencies, _ = asyncio.run(_drive(found.port, found.protocol, _stamped(payloads, latency_messages),
                                             rate, 60 + latency_messages / rate))
    finally:
        stop_process(child, timeout=20)
        if child.stdout is not None:
            child.stdout.close()
    return RelayRun(throughput, 1e6 * cpu / messages, statistics.median(latencies), _percentile(latencies, 0.99),
                    forwarded, pss)


def main(argv: list[str] | None = None) -> int:
    """The processes under test: ``broker PORT``, ``passthrough PORT PROTOCOL LOOP``,
    ``relay CONFIG RUNNER PORT PROTOCOL LOOP MESSAGES`` (RUNNER ``-`` keeps the configured one)."""
    from relay.live.serve import run_coroutine

    parser = argparse.ArgumentParser(prog="python -m relay.workbench.endtoend")
    parser.add_argument("what", choices=["broker", "passthrough", "relay"])
    parser.add_argument("rest", nargs="*")
    args = parser.parse_args(argv)
    if args.what == "broker":
        from relay.live.embedded_broker import EmbeddedBroker

        async def embedded() -> None:
            async with EmbeddedBroker(int(args.rest[0])):
                await asyncio.Event().wait()

        asyncio.run(embedded())
        return 0
    if args.what == "passthrough":
        port, protocol, loop = args.rest
        print("ready", flush=True)
        run_coroutine(serve_passthrough(int(port), protocol), event_loop=loop)
        return 0
    from relay.live.serve import serve

    config, runner, port, protocol, loop, messages = args.rest
    active = bench_active(Path(config), int(port), protocol, None if runner == "-" else runner)
    _warm(active, Path(messages))
    print("ready", flush=True)
    run_coroutine(serve(active, freeze_heap=True), event_loop=loop)
    return 0


if __name__ == "__main__":
    sys.exit(main())

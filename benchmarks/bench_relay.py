"""Relay throughput and latency: a bare aiomqtt pass-through relay vs the rehear chain, side by side.

Starts mosquitto on a free loopback port with ``set_tcp_nodelay true``, then for each relay
runs it in its own process and drives it from this one:

- throughput: N messages (1 KB, 10-best) published at QoS 1 as fast as the broker takes them;
  msg/s from the first publish to the last result received;
- latency: messages paced at --rate msg/s; publish -> result received, p50 and p99.

Targets (DESIGN.md): chain >= 50% of pass-through throughput; added p99 <= 3 ms.

    PYTHONPATH=. python benchmarks/bench_relay.py [--messages 3000] [--rate 200]
"""

from __future__ import annotations

import argparse
import asyncio
import os
import shutil
import socket
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import aiomqtt
import orjson

ROOT = Path(__file__).resolve().parents[1]
NODELAY = [(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)]


def _free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


def _payload(index: int, sent_ns: int) -> bytes:
    words = ["book", "the", "carving", "band", "saw", "for", "two", "thirty", "in", "the", "east", "wood", "shop"]
    nbest = [{"text": " ".join(words[: 8 + (i % 4)]) + f" {i}", "conf": round(0.5 / (i + 1), 4),
              "logprob": -40.0 - i} for i in range(10)]
    return orjson.dumps({"id": f"b-{index}", "source": "kiosk-1", "speaker": "member-1", "sent_ns": sent_ns,
                         "nbest": nbest, "pad": "x" * 200})


# ---- the relays under test (run in a child process) ---------------------------------------

async def _serve_passthrough(port: int) -> None:
    """The baseline: subscribe, publish each payload on from its own task, QoS 1, TCP_NODELAY."""
    slots = asyncio.Semaphore(64)
    async with aiomqtt.Client("127.0.0.1", port, identifier="bench-pass", socket_options=NODELAY) as client:
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


def _serve_chain(port: int, runner: str) -> None:
    from relay.commands.run import run_coroutine, serve
    from relay.service import load_active

    config = Path(tempfile.mkdtemp()) / "bench.yaml"
    config.write_text(
        f"broker: {{host: 127.0.0.1, port: {port}, client_id: bench-chain-{runner}}}\n"
        "topics: {inputs: ['bench/in/#'], output: 'bench/out/{source}'}\n"
        f"limits: {{chain_runner: {runner}, max_in_flight: 64}}\n"
        "metrics: {enabled: false}\nlogging: {level: error}\nstages: [normalize]\n"
    )
    run_coroutine(serve(load_active(config)))


# ---- the driver ---------------------------------------------------------------------------

async def _drive(port: int, count: int, rate: float | None) -> tuple[float, list[float]]:
    latencies: list[float] = []
    done = asyncio.Event()
    received = 0

    async with aiomqtt.Client("127.0.0.1", port, identifier=f"bench-sub-{time.time_ns()}",
                              socket_options=NODELAY) as sub:
        await sub.subscribe("bench/out/#", qos=1)

        async def collect() -> None:
            nonlocal received
            async for message in sub.messages:
                now = time.perf_counter_ns()
                latencies.append((now - orjson.loads(message.payload)["sent_ns"]) / 1e6)
                received += 1
                if received >= count:
                    done.set()
                    return

        collector = asyncio.create_task(collect())
        async with aiomqtt.Client("127.0.0.1", port, identifier=f"bench-pub-{time.time_ns()}",
                                  socket_options=NODELAY) as pub:
            pub.pending_calls_threshold = 1000
            window = asyncio.Semaphore(128)
            start = time.perf_counter()

            async def send(index: int) -> None:
                try:
                    await pub.publish("bench/in/kiosk-1", _payload(index, time.perf_counter_ns()), qos=1)
                finally:
                    window.release()

            tasks = []
            for index in range(count):
                if rate:
                    await asyncio.sleep(max(0.0, start + index / rate - time.perf_counter()))
                await window.acquire()
                tasks.append(asyncio.create_task(send(index)))
            await asyncio.gather(*tasks)
            await asyncio.wait_for(done.wait(), timeout=60 + count / 100)
            elapsed = time.perf_counter() - start
        collector.cancel()
    return count / elapsed, latencies


def _percentile(values: list[float], q: float) -> float:
    return statistics.quantiles(values, n=1000)[int(q * 1000) - 1]


def _measure(kind: str, port: int, args: argparse.Namespace) -> dict[str, float]:
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    child = subprocess.Popen([sys.executable, __file__, "--serve", kind, "--port", str(port)], env=env)
    try:
        time.sleep(1.0)  # connect and subscribe
        asyncio.run(_drive(port, 200, None))  # warm-up
        throughput, _ = asyncio.run(_drive(port, args.messages, None))
        _, latencies = asyncio.run(_drive(port, args.latency_messages, args.rate))
    finally:
        child.terminate()
        child.wait(timeout=20)
    return {"msg_s": throughput, "p50_ms": statistics.median(latencies), "p99_ms": _percentile(latencies, 0.99)}


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--messages", type=int, default=3000, help="messages per throughput run")
    parser.add_argument("--latency-messages", type=int, default=600, help="messages per latency run")
    parser.add_argument("--rate", type=float, default=200.0, help="msg/s during the latency run")
    parser.add_argument("--mosquitto", default=shutil.which("mosquitto") or "/usr/sbin/mosquitto")
    parser.add_argument("--serve", choices=["passthrough", "chain-thread", "chain-loop"], help=argparse.SUPPRESS)
    parser.add_argument("--port", type=int, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.serve == "passthrough":
        asyncio.run(_serve_passthrough(args.port))
        return 0
    if args.serve:
        _serve_chain(args.port, args.serve.removeprefix("chain-"))
        return 0

    port = _free_port()
    workdir = Path(tempfile.mkdtemp(prefix="rehear-bench-"))
    (workdir / "mosquitto.conf").write_text(
        f"listener {port} 127.0.0.1\nallow_anonymous true\nset_tcp_nodelay true\n"
        "max_inflight_messages 0\nmax_queued_messages 100000\n"
    )
    broker = subprocess.Popen([args.mosquitto, "-c", str(workdir / "mosquitto.conf")], stderr=subprocess.DEVNULL)
    try:
        time.sleep(0.5)
        results = {kind: _measure(kind, port, args) for kind in ("passthrough", "chain-thread", "chain-loop")}
    finally:
        broker.terminate()
        broker.wait(timeout=10)
    base = results["passthrough"]
    print(f"\n{'relay':<14}{'msg/s':>9}{'% of pass':>11}{'p50 ms':>9}{'p99 ms':>9}{'added p99':>11}")
    for kind, result in results.items():
        print(f"{kind:<14}{result['msg_s']:>9.0f}{100 * result['msg_s'] / base['msg_s']:>10.0f}%"
              f"{result['p50_ms']:>9.2f}{result['p99_ms']:>9.2f}{result['p99_ms'] - base['p99_ms']:>+11.2f}")
    print(f"\n{args.messages} messages per throughput run, {args.latency_messages} at {args.rate:g} msg/s for "
          "latency; 1 KB 10-best, QoS 1, local mosquitto with set_tcp_nodelay true")
    return 0


if __name__ == "__main__":
    sys.exit(main())

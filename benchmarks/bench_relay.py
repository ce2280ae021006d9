"""Relay throughput and latency: a bare aiomqtt pass-through relay vs the rehear chain, side by side.

Starts mosquitto on a free loopback port with ``set_tcp_nodelay true``. Every relay under test
runs in its own process with the same MQTT protocol, event loop, TCP_NODELAY and in-flight
window (64), and is driven from this process:

- throughput: --messages messages (1 KB, 10-best) published at QoS 1, up to 128 unacknowledged;
  msg/s from the first publish to the last result received, and the relay process's own CPU
  time per message (user + system, from /proc);
- latency: --latency-messages messages paced at --rate msg/s; publish -> result received,
  p50 and p99 (two broker hops included, as for the pass-through).

The chain is the one in --config (default: [normalize]) plus, for each --stage-cost-us value
above 0, a benchmark-only stage that busy-waits that long per message: it stands in for stages
not written yet (the lexicon). Runs are interleaved --repeat times; the table shows medians.

--capture adds, beside each chain case, the same chain with capture on (relay/live/capture.py,
writing into a temporary directory), to show what recording every message costs.

Targets (DESIGN.md): chain >= 50% of pass-through throughput; added p99 <= 3 ms.

    PYTHONPATH=. python benchmarks/bench_relay.py
    PYTHONPATH=. python benchmarks/bench_relay.py --stage-cost-us 0,300,1000 --runners thread,loop
    PYTHONPATH=. python benchmarks/bench_relay.py --config examples/workshop/relay.yaml
"""

from __future__ import annotations

import argparse
import asyncio
import dataclasses
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any, ClassVar

import aiomqtt
import orjson
from pydantic import BaseModel, ConfigDict, Field

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from relay.workbench.endtoend import NODELAY, WINDOW, free_port, serve_passthrough  # noqa: E402 - after the path

DEFAULT_CHAIN = "stages: [normalize]\n"


def _payload(index: int, sent_ns: int) -> bytes:
    words = ["book", "the", "carving", "band", "saw", "for", "two", "thirty", "in", "the", "east", "wood", "shop"]
    nbest = [{"text": " ".join(words[: 8 + (i % 4)]) + f" {i}", "conf": round(0.5 / (i + 1), 4),
              "logprob": -40.0 - i} for i in range(10)]
    return orjson.dumps({"id": f"b-{index}", "source": "kiosk-1", "speaker": "member-1", "sent_ns": sent_ns,
                         "nbest": nbest, "pad": "x" * 200})


def _has_uvloop() -> bool:
    try:
        import uvloop  # noqa: F401
    except ImportError:
        return False
    return True


def _run(coroutine: Any, event_loop: str) -> Any:
    from relay.live.serve import run_coroutine

    return run_coroutine(coroutine, event_loop=event_loop)


# ---- the relays under test (run in a child process) ---------------------------------------

class BusyStage:
    """Benchmark only: costs ``cost_us`` of CPU per message (holding the GIL, like Python stages)."""

    name: ClassVar[str] = "bench_busy"
    needs: ClassVar[frozenset[str]] = frozenset()
    provides: ClassVar[frozenset[str]] = frozenset()

    class Settings(BaseModel):
        model_config = ConfigDict(extra="forbid")
        cost_us: float = Field(0.0, ge=0)

    def __init__(self, settings: Settings, *, context: Any) -> None:
        self.cost_ns = int(settings.cost_us * 1000)

    def load(self) -> None:
        pass

    def process(self, utterance: Any) -> Any:
        end = time.perf_counter_ns() + self.cost_ns
        while time.perf_counter_ns() < end:
            pass
        return utterance


def _bench_active(port: int, args: argparse.Namespace) -> Any:
    """The configured chain (plus the busy stage) with broker, topics and limits set for the bench."""
    from relay.core.config import StageSpec, build_chain, load_config
    from relay.core.registry import Registry
    from relay.live.active import Active

    if args.config:
        loaded = load_config(args.config)
    else:
        path = Path(tempfile.mkdtemp(prefix="rehear-bench-")) / "bench.yaml"
        path.write_text(DEFAULT_CHAIN)
        loaded = load_config(path)
    config = loaded.config
    stages = list(config.stages)
    if args.cost_us > 0:
        stages.append(StageSpec(name=BusyStage.name, params={"cost_us": args.cost_us}, index=len(stages)))
    config = config.model_copy(update={
        "broker": config.broker.model_copy(update={
            "host": "127.0.0.1", "port": port, "protocol": args.protocol,
            "client_id": f"bench-chain-{time.time_ns()}", "tcp_nodelay": True}),
        # one result per input on the subscribed topic, whatever the gate decides
        "topics": config.topics.model_copy(update={
            "inputs": ["bench/in/#"], "output": "bench/out/{source}", "prompt": "bench/prompt/{source}",
            "dead_letter": "bench/dead", "input_qos": 1, "output_qos": 1, "forward_unsure": True}),
        "limits": config.limits.model_copy(update={"chain_runner": args.runner, "max_in_flight": WINDOW}),
        "metrics": config.metrics.model_copy(update={"enabled": False}),  # still counted, not served
        "capture": config.capture.model_copy(update={"enabled": bool(args.capture_dir),
                                                     "directory": Path(args.capture_dir or "capture")}),
        "stages": stages,
    })
    loaded = dataclasses.replace(loaded, config=config)
    registry = Registry()
    registry.register(BusyStage)  # type: ignore[arg-type]
    chain = build_chain(loaded, registry=registry)
    chain.load()
    return Active(loaded, chain)


def _serve_chain(port: int, args: argparse.Namespace) -> None:
    from relay.live.serve import serve

    _run(serve(_bench_active(port, args)), args.event_loop)


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
            window = asyncio.Semaphore(2 * WINDOW)
            start = time.perf_counter()

            async def send(index: int) -> None:
                try:
                    await pub.publish("bench/in/kiosk-1", _payload(index, time.perf_counter_ns()), qos=1)
                finally:
                    window.release()

            tasks = []
            for index in range(count):  # bounded: exactly `count` messages
                if rate:
                    await asyncio.sleep(max(0.0, start + index / rate - time.perf_counter()))
                await window.acquire()
                tasks.append(asyncio.create_task(send(index)))
            await asyncio.gather(*tasks)
            await asyncio.wait_for(done.wait(), timeout=60 + count / 100)
            elapsed = time.perf_counter() - start
        collector.cancel()
    return count / elapsed, latencies


def _cpu_seconds(pid: int) -> float:
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")  # utime + stime


def _percentile(values: list[float], q: float) -> float:
    return statistics.quantiles(values, n=1000)[int(q * 1000) - 1]


def _measure(serve: list[str], port: int, args: argparse.Namespace) -> dict[str, float]:
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    child = subprocess.Popen([sys.executable, __file__, "--port", str(port), "--protocol", args.protocol,
                              "--event-loop", args.event_loop, *serve], env=env)
    try:
        time.sleep(1.0 if not args.config else 3.0)  # start, load, connect and subscribe
        if child.poll() is not None:
            raise SystemExit(f"the relay under test ({' '.join(serve)}) exited with {child.returncode}")
        asyncio.run(_drive(port, 200, None))  # warm-up
        cpu = _cpu_seconds(child.pid)
        throughput, _ = asyncio.run(_drive(port, args.messages, None))
        cpu = _cpu_seconds(child.pid) - cpu
        _, latencies = asyncio.run(_drive(port, args.latency_messages, args.rate))
    finally:
        child.terminate()
        child.wait(timeout=20)
    return {"msg_s": throughput, "cpu_us": 1e6 * cpu / args.messages,
            "p50_ms": statistics.median(latencies), "p99_ms": _percentile(latencies, 0.99)}


def _costs(text: str) -> list[float]:
    try:
        values = [float(part) for part in text.split(",") if part.strip()]
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected comma-separated microseconds, got {text!r}") from None
    if not values or any(value < 0 for value in values):
        raise argparse.ArgumentTypeError(f"expected one or more values >= 0, got {text!r}")
    return values


def _runners(text: str) -> list[str]:
    values = [part.strip() for part in text.split(",") if part.strip()]
    if not values or any(value not in ("thread", "loop") for value in values):
        raise argparse.ArgumentTypeError(f"expected thread, loop or both, got {text!r}")
    return values


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--config", help="relay configuration whose chain to measure (broker, topics and "
                        "limits.chain_runner are set by the benchmark); default: stages [normalize]")
    parser.add_argument("--stage-cost-us", type=_costs, default=[0.0],
                        help="comma-separated extra chain costs in microseconds, e.g. 0,300,1000 (default 0)")
    parser.add_argument("--runners", type=_runners, default=["thread"],
                        help="limits.chain_runner values to measure: thread, loop or thread,loop (default thread)")
    parser.add_argument("--protocol", choices=["5", "3.1.1"], default="5", help="MQTT version of every relay")
    parser.add_argument("--event-loop", choices=["asyncio", "uvloop"],
                        default="uvloop" if _has_uvloop() else "asyncio",
                        help="event loop of every relay (default: uvloop when installed)")
    parser.add_argument("--messages", type=int, default=3000, help="messages per throughput run")
    parser.add_argument("--latency-messages", type=int, default=600, help="messages per latency run")
    parser.add_argument("--rate", type=float, default=200.0, help="msg/s during the latency run")
    parser.add_argument("--repeat", type=int, default=2, help="interleaved rounds; the table shows medians")
    parser.add_argument("--mosquitto", default=shutil.which("mosquitto") or "/usr/sbin/mosquitto")
    parser.add_argument("--serve", choices=["passthrough", "chain"], help=argparse.SUPPRESS)
    parser.add_argument("--runner", choices=["thread", "loop"], default="thread", help=argparse.SUPPRESS)
    parser.add_argument("--cost-us", type=float, default=0.0, help=argparse.SUPPRESS)
    parser.add_argument("--port", type=int, help=argparse.SUPPRESS)
    parser.add_argument("--capture", action="store_true", help="also run each chain case with capture on")
    parser.add_argument("--capture-dir", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.serve == "passthrough":
        _run(serve_passthrough(args.port, args.protocol), args.event_loop)
        return 0
    if args.serve == "chain":
        _serve_chain(args.port, args)
        return 0

    cases: dict[str, list[str]] = {"passthrough": ["--serve", "passthrough"]}
    for cost in args.stage_cost_us:
        for runner in args.runners:
            serve = ["--serve", "chain", "--runner", runner, "--cost-us", str(cost)]
            if args.config:
                serve += ["--config", args.config]
            cases[f"{runner} +{cost:g} us"] = serve
            if args.capture:
                cases[f"{runner} +{cost:g} us cap"] = [*serve, "--capture-dir", tempfile.mkdtemp(prefix="rehear-cap-")]
    port = free_port()
    workdir = Path(tempfile.mkdtemp(prefix="rehear-bench-"))
    (workdir / "mosquitto.conf").write_text(
        f"listener {port} 127.0.0.1\nallow_anonymous true\nset_tcp_nodelay true\n"
        "max_inflight_messages 0\nmax_queued_messages 100000\n"
    )
    broker = subprocess.Popen([args.mosquitto, "-c", str(workdir / "mosquitto.conf")], stderr=subprocess.DEVNULL)
    runs: dict[str, list[dict[str, float]]] = {name: [] for name in cases}
    try:
        time.sleep(0.5)
        for round_ in range(args.repeat):  # interleaved, so drift hits every case alike
            for name, serve in cases.items():
                runs[name].append(_measure(serve, port, args))
                print(f"round {round_ + 1}/{args.repeat} {name}: {runs[name][-1]['msg_s']:.0f} msg/s",
                      file=sys.stderr)
    finally:
        broker.terminate()
        broker.wait(timeout=10)
    results = {name: {key: statistics.median(run[key] for run in found) for key in found[0]}
               for name, found in runs.items()}
    base = results["passthrough"]
    print(f"\n{'relay':<16}{'msg/s':>8}{'range':>12}{'% of pass':>11}{'CPU us/msg':>12}"
          f"{'p50 ms':>8}{'p99 ms':>8}{'added p99':>11}")
    for name, result in results.items():
        spread = f"{min(r['msg_s'] for r in runs[name]):.0f}-{max(r['msg_s'] for r in runs[name]):.0f}"
        print(f"{name:<16}{result['msg_s']:>8.0f}{spread:>12}{100 * result['msg_s'] / base['msg_s']:>10.0f}%"
              f"{result['cpu_us']:>12.0f}{result['p50_ms']:>8.2f}{result['p99_ms']:>8.2f}"
              f"{result['p99_ms'] - base['p99_ms']:>+11.2f}")
    chain = f"--config {args.config}" if args.config else "stages [normalize]"
    print(f"\nchain: {chain} (+ busy stage); MQTT {args.protocol}, {args.event_loop}; {args.messages} messages "
          f"per throughput run, {args.latency_messages} at {args.rate:g} msg/s for latency; medians of "
          f"{args.repeat}; 1 KB 10-best, QoS 1, local mosquitto with set_tcp_nodelay true")
    return 0


if __name__ == "__main__":
    sys.exit(main())

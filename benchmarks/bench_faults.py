"""The expensive-message load of the fault probe (issue 12, finding 5), measured.

Starts mosquitto on a free loopback port and the relay in this process with the example
workshop configuration, then sends ``--rate`` good messages a second and, every ``--every``
seconds, one message of one hypothesis holding ``--numbers`` numbers (20,000: about 109 KB, and
1.6 s of chain CPU without the word limits), for ``--seconds``. Reports for each setting:

- the good messages' publish-to-result latency (p50, p99) and how many went on uncleaned;
- the event loop's lag (``rehear_event_loop_lag_seconds``: how late a 100 ms timer ran), p99
  and the worst;
- the process's RSS before, at the peak and after the burst (psutil), with and without
  glibc's ``malloc_trim(0)`` after the burst.

    PYTHONPATH=. python benchmarks/bench_faults.py                        # defaults and limits off
    PYTHONPATH=. python benchmarks/bench_faults.py --settings limits --seconds 20
"""

from __future__ import annotations

import argparse
import asyncio
import ctypes
import gc
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import aiomqtt
import orjson
import psutil
import yaml
from prometheus_client import CollectorRegistry

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from relay.live.active import load_active  # noqa: E402
from relay.live.serve import serve  # noqa: E402
from relay.workbench.endtoend import free_port  # noqa: E402

SETTINGS = {
    "limits": {},  # the defaults: word limits on, deadline checked inside the stages
    "no-limits": {"max_words_per_hypothesis": 10**9, "max_words": 10**9, "max_word_chars": 10**9},
}


def _config(folder: Path, port: int, limits: dict[str, Any]) -> Path:
    config = yaml.safe_load((ROOT / "examples/workshop/relay.yaml").read_text())
    config["broker"] = {"host": "127.0.0.1", "port": port, "client_id": f"bench-faults-{port}"}
    config["domain"] = {role: str(ROOT / "examples/workshop" / name) for role, name in config["domain"].items()}
    config["metrics"] = {"enabled": False}
    config["logging"] = {"level": "error"}
    config["limits"] = {**config.get("limits", {}), **limits}
    path = folder / f"relay-{port}.yaml"
    path.write_text(yaml.safe_dump(config, sort_keys=False))
    return path


def _quantile(values: list[float], q: float) -> float:
    ordered = sorted(values)
    return ordered[min(len(ordered) - 1, int(q * len(ordered)))] if ordered else float("nan")


def _lag(registry: CollectorRegistry) -> tuple[float, float]:
    """p99 upper bucket bound and the number of timer ticks, from the lag histogram."""
    buckets = []
    for family in registry.collect():
        if family.name == "rehear_event_loop_lag_seconds":
            buckets = [(float(s.labels["le"]), s.value) for s in family.samples if s.name.endswith("_bucket")]
    total = buckets[-1][1] if buckets else 0
    p99 = next((bound for bound, count in buckets if count >= 0.99 * total), float("nan"))
    return p99, total


async def _run(port: int, path: Path, args: argparse.Namespace, trim: bool) -> dict[str, Any]:
    process = psutil.Process()
    registry = CollectorRegistry()
    active = load_active(path)
    gc.collect()
    ready = asyncio.get_running_loop().create_future()
    task = asyncio.create_task(serve(active, registry=registry, signals=False,
                                     on_ready=lambda relay, health: ready.set_result(relay)))
    relay = await asyncio.wait_for(ready, 30)
    while not relay.connected:
        await asyncio.sleep(0.05)
    rss_before = process.memory_info().rss
    sent: dict[str, float] = {}
    done: dict[str, tuple[float, str | None]] = {}
    peak = rss_before
    worst_lag = 0.0
    text = " ".join(str(i) for i in range(args.numbers))

    async def collect(client: aiomqtt.Client) -> None:
        async for item in client.messages:
            body = orjson.loads(item.payload)
            done[body["id"]] = (time.monotonic(), body["relay"].get("passthrough"))

    async def watch() -> None:
        nonlocal peak, worst_lag
        loop = asyncio.get_running_loop()
        while True:
            asked = loop.time() + 0.05
            await asyncio.sleep(0.05)
            worst_lag = max(worst_lag, loop.time() - asked)
            peak = max(peak, process.memory_info().rss)

    async with aiomqtt.Client("127.0.0.1", port, identifier=f"sink-{port}") as sink, \
            aiomqtt.Client("127.0.0.1", port, identifier=f"source-{port}") as source:
        await sink.subscribe("workshop/+/nlu", qos=1)
        collecting = asyncio.create_task(collect(sink))
        watching = asyncio.create_task(watch())
        began = time.monotonic()
        next_big = began + 1.0
        index = 0
        while time.monotonic() - began < args.seconds:
            now = time.monotonic()
            if now >= next_big:
                ident = f"big-{index}"
                sent[ident] = now
                await source.publish("workshop/bench-1/asr", orjson.dumps(
                    {"id": ident, "source": "bench-1", "nbest": [{"text": text}]}), qos=1)
                next_big += args.every
            ident = f"good-{index}"
            sent[ident] = time.monotonic()
            await source.publish("workshop/bench-1/asr", orjson.dumps(
                {"id": ident, "source": "bench-1", "nbest": [{"text": "book the tullow vacuum former for siobhan"},
                                                             {"text": "book the cello vacuum former for siobhan"}]}),
                qos=1)
            index += 1
            await asyncio.sleep(max(0.0, began + index / args.rate - time.monotonic()))
        end = time.monotonic() + 30
        while len(done) < len(sent) and time.monotonic() < end:
            await asyncio.sleep(0.05)
        watching.cancel()
        collecting.cancel()
    gc.collect()
    rss_after = process.memory_info().rss
    if trim:
        ctypes.CDLL("libc.so.6").malloc_trim(0)
    rss_trimmed = process.memory_info().rss
    relay.request_stop()
    await asyncio.wait_for(task, 30)
    good = [done[i][0] - sent[i] for i in sent if i.startswith("good") and i in done]
    uncleaned = sum(1 for i in sent if i.startswith("good") and i in done and done[i][1])
    p99_lag, ticks = _lag(registry)
    return {"good": len(good), "lost": len(sent) - len(done), "uncleaned": uncleaned,
            "p50_ms": statistics.median(good) * 1000, "p99_ms": _quantile(good, 0.99) * 1000,
            "lag_p99_ms": p99_lag * 1000, "lag_worst_ms": worst_lag * 1000, "ticks": ticks,
            "rss_before": rss_before / 2**20, "rss_peak": peak / 2**20, "rss_after": rss_after / 2**20,
            "rss_trimmed": rss_trimmed / 2**20}


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--settings", default="limits,no-limits", help="comma-separated: " + ", ".join(SETTINGS))
    parser.add_argument("--seconds", type=float, default=15.0)
    parser.add_argument("--rate", type=float, default=100.0, help="good messages a second")
    parser.add_argument("--every", type=float, default=3.0, help="seconds between expensive messages")
    parser.add_argument("--numbers", type=int, default=20_000, help="numbers in the expensive hypothesis")
    parser.add_argument("--mosquitto", default=shutil.which("mosquitto") or "/usr/sbin/mosquitto")
    args = parser.parse_args()
    port = free_port()
    with tempfile.TemporaryDirectory() as folder:
        conf = Path(folder) / "mosquitto.conf"
        conf.write_text(f"listener {port} 127.0.0.1\nallow_anonymous true\nset_tcp_nodelay true\n")
        broker = subprocess.Popen([args.mosquitto, "-c", str(conf)], stderr=subprocess.DEVNULL)
        try:
            time.sleep(0.5)  # the broker binds its port; a benchmark, not a test
            print(f"{args.rate:g} good msg/s, one {args.numbers}-number message every {args.every:g} s, "
                  f"{args.seconds:g} s, example workshop chain")
            print("setting     trim | good  lost uncleaned | p50 ms  p99 ms | lag p99 ms worst ms | "
                  "RSS MB before peak after trimmed")
            for name in args.settings.split(","):
                for trim in (False, True):
                    result = asyncio.run(_run(port, _config(Path(folder), port, SETTINGS[name]), args, trim))
                    print(f"{name:<11} {'yes' if trim else 'no ':<4} | {result['good']:>4} {result['lost']:>5} "
                          f"{result['uncleaned']:>9} | {result['p50_ms']:>6.1f} {result['p99_ms']:>7.1f} | "
                          f"{result['lag_p99_ms']:>10.1f} {result['lag_worst_ms']:>8.1f} | "
                          f"{result['rss_before']:>11.0f} {result['rss_peak']:>4.0f} {result['rss_after']:>5.0f} "
                          f"{result['rss_trimmed']:>7.0f}")
        finally:
            broker.terminate()
            broker.wait(10)
    return 0


if __name__ == "__main__":
    sys.exit(main())

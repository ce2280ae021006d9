"""`rehear bench`: how fast rehear is on this machine, with this configuration.

Measured in one run, each part in a process of its own where the heap or the CPU clock must be
the relay's alone:

- in process: per-message latency of the chain and of each stage (the relay's parser, then
  ``Chain.process``; the heap frozen as `rehear run` freezes it, the first pass untimed);
- end to end through a broker (relay.workbench.endtoend): a bare pass-through relay and the
  relay with the chain, in turns; throughput of each, their ratio, and the latency the chain
  adds at a fixed rate;
- the lexicon stage alone over generated lexicons of 1k, 10k and 100k entries, on the same
  messages: cold build, p99 and RSS;
- start-up: a fresh process until the chain is loaded, with an empty lexicon cache (cold) and
  with the cache it left (warm); RSS after every message has been through once.

``--quick`` measures less of everything (the 1k lexicon only) for a smoke test; its numbers
are not for comparing.
"""

from __future__ import annotations

import argparse
import datetime
import gc
import json
import os
import statistics
import subprocess
import sys
import tempfile
import time
import timeit
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import orjson

from relay.workbench.benchdata import Workload, read_messages

__all__ = ["BenchOptions", "format_markdown", "format_table", "in_process", "lexicon_scaling", "run_bench", "startup"]

SIZES = (1000, 10000, 100000)


@dataclass(frozen=True, slots=True)
class BenchOptions:
    quick: bool = False
    runners: tuple[str, ...] = ()  # chain_runner values to measure end to end; () keeps the configured one
    repeat: int = 2  # end-to-end rounds, pass-through and chain in turns
    messages: int = 3000  # per end-to-end throughput run
    latency_messages: int = 600
    rate: float = 200.0
    event_loop: str = "auto"
    embedded: bool = False  # use the embedded broker even when mosquitto is installed
    sizes: tuple[int, ...] = SIZES
    end_to_end: bool = True


def _quantiles(values: Sequence[float]) -> dict[str, float]:
    ordered = sorted(values)
    if not ordered:
        return {"p50": 0.0, "p99": 0.0}
    return {"p50": round(ordered[len(ordered) // 2], 1),
            "p99": round(ordered[min(len(ordered) - 1, int(0.99 * len(ordered)))], 1)}


def _rss_mb(field: str = "VmRSS") -> float:
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith(field + ":"):
            return round(int(line.split()[1]) / 1024, 1)
    return 0.0


def _child(*args: str, timeout: float = 600) -> dict[str, Any]:
    """Run ``python -m relay.workbench.bench ARGS`` and read the JSON of its last output line."""
    done = subprocess.run([sys.executable, "-m", "relay.workbench.bench", *args], capture_output=True, text=True,
                          timeout=timeout)
    if done.returncode != 0:
        raise RuntimeError(f"bench step {args[0]} failed:\n{done.stderr.strip()[-2000:]}")
    result: dict[str, Any] = json.loads(done.stdout.strip().splitlines()[-1])
    return result


# ---- in process ------------------------------------------------------------------------------

def in_process(config: Path, messages: Sequence[bytes], *, passes: int) -> dict[str, Any]:
    """p50/p99 in microseconds of the whole chain and of each stage, per message."""
    from relay.live.active import load_active
    from relay.live.heap import freeze_loaded
    from relay.live.messages import parse_message

    active = load_active(config)
    fields = active.loaded.config.fields
    chain = active.chain

    def parsed() -> list[Any]:
        return [parse_message(m, topic="bench/in/kiosk-1", field_map=fields) for m in messages]

    for utterance in parsed():  # untimed: fills the word caches, as a running relay has them
        chain.process(utterance)
    freeze_loaded()
    whole: list[float] = []
    stages: dict[str, list[float]] = {name: [] for name in chain.names}
    for _ in range(passes):
        for utterance in parsed():
            began = time.perf_counter_ns()
            done = chain.process(utterance)
            whole.append((time.perf_counter_ns() - began) / 1000)
            for entry in done.trace:
                stages[entry.stage].append(entry.elapsed_us)
    gc.unfreeze()
    return {"chain_us": _quantiles(whole), "stage_us": {name: _quantiles(v) for name, v in stages.items()},
            "in_process_messages": len(whole)}


# ---- start-up --------------------------------------------------------------------------------

def startup(config: Path, messages_file: Path, cache: Path) -> dict[str, Any]:
    """Seconds from a fresh process to a loaded chain, with no lexicon cache and with one; RSS."""
    out: dict[str, Any] = {}
    for kind in ("cold", "warm"):
        began = time.time()
        found = _child("startup", str(config), str(cache), str(messages_file))
        out[kind] = round(found["loaded_at"] - began, 2)
        if kind == "warm":
            return {"startup_s": out, "rss_mb": found["rss_mb"], "peak_rss_mb": found["peak_rss_mb"]}
    raise AssertionError("unreachable")  # pragma: no cover


def _startup_child(config: str, cache: str, messages_file: str) -> dict[str, Any]:
    from relay.core.config import build_chain, load_config
    from relay.live.messages import parse_message

    loaded = load_config(config)
    loaded.config = loaded.config.model_copy(update={"cache_dir": cache})
    chain = build_chain(loaded)
    chain.load()
    loaded_at = time.time()
    for message in read_messages(Path(messages_file)):
        chain.process(parse_message(message, topic="bench/in/kiosk-1", field_map=loaded.config.fields))
    return {"loaded_at": loaded_at, "rss_mb": _rss_mb(), "peak_rss_mb": _rss_mb("VmHWM")}


# ---- the lexicon stage over generated lexicons -----------------------------------------------

def lexicon_scaling(sizes: Sequence[int], messages_file: Path, *, count: int) -> dict[str, Any]:
    """Per size: cold build seconds (a process of its own), then p99 in us and RSS in MB of the
    lexicon stage (default settings) in another process that loads from the cache."""
    out: dict[str, Any] = {}
    for size in sizes:
        with tempfile.TemporaryDirectory(prefix="rehear-bench-lexicon-") as folder:
            built = _child("lexicon-build", folder, str(size))
            found = _child("lexicon-measure", folder, str(messages_file), str(count))
        out[str(size)] = {"p99_us": found["p99_us"], "p50_us": found["p50_us"], "build_s": built["build_s"],
                          "rss_mb": found["rss_mb"]}
    return out


def build_lexicon(folder: Path, size: int, seed: int = 7) -> float:
    """Write a generated lexicon of ``size`` entries into ``folder`` and compile it cold; seconds."""
    from relay.core.stage import StageContext
    from relay.workbench.synthetic import make_lexicon
    from stages.lexicon.settings import LexiconSettings
    from stages.lexicon.stage import LexiconStage

    make_lexicon(size, folder / "lexicon.csv", seed)
    context = StageContext(base_dir=folder, cache_dir=folder / "cache")
    began = time.perf_counter()
    LexiconStage(LexiconSettings(lexicon=Path("lexicon.csv")), context=context).load()
    return time.perf_counter() - began


def time_lexicon(folder: Path, texts: Sequence[Sequence[str]]) -> tuple[list[float], float]:
    """Per-message lexicon stage times in us (the first tenth, up to 20, untimed: word caches) and
    the seconds of the warm load from the cache ``build_lexicon`` left."""
    from relay.core.stage import StageContext
    from relay.core.utterance import Hypothesis, TraceEntry, Utterance
    from relay.live.heap import freeze_loaded
    from stages.lexicon.settings import LexiconSettings
    from stages.lexicon.stage import LexiconStage
    from stages.normalize.stage import NormalizeSettings, NormalizeStage

    context = StageContext(base_dir=folder, cache_dir=folder / "cache")
    stage = LexiconStage(LexiconSettings(lexicon=Path("lexicon.csv")), context=context)
    began = time.perf_counter()
    stage.load()
    warm = time.perf_counter() - began
    normalize = NormalizeStage(NormalizeSettings(prefer="rank"), context=context)
    freeze_loaded()  # as `rehear run` does once the chain is loaded
    times = []
    for hypotheses in texts:
        nbest = [Hypothesis(t, r, {}) for r, t in enumerate(hypotheses)]
        utterance = normalize.process(Utterance("m", "bench", None, {}, nbest))
        utterance.trace.append(TraceEntry("lexicon"))
        began_ns = time.perf_counter_ns()
        stage.process(utterance)
        times.append((time.perf_counter_ns() - began_ns) / 1000)
    return times[min(20, len(times) // 10):], warm


def _texts(messages: Sequence[bytes], count: int) -> list[list[str]]:
    rows = [orjson.loads(m) for m in messages]
    texts = [[str(h.get("text", "")) for h in row["nbest"]] for row in rows]
    return [texts[n % len(texts)] for n in range(count)] if texts else []


# ---- all of it -------------------------------------------------------------------------------

def python_loop_us() -> float:
    """Microseconds this machine takes for ``sum(range(100))`` (the best of five timings): a
    yardstick of its speed at the moment, so runs on other machines, or on this one when its
    neighbours are busy, can be set side by side."""
    timings = timeit.repeat("sum(range(100))", number=20_000, repeat=5)
    return round(min(timings) / 20_000 * 1e6, 3)


def _context(workload: Workload, options: BenchOptions) -> dict[str, Any]:
    load = os.getloadavg()
    return {"date": datetime.datetime.now(datetime.UTC).strftime("%Y-%m-%d %H:%M UTC"), "rate": options.rate,
            "cpus": len(os.sched_getaffinity(0)), "load_before": [round(v, 2) for v in load],
            "python_loop_us_before": python_loop_us(),
            "workload": workload.description, "quick": options.quick, "python": sys.version.split()[0]}


def run_bench(workload: Workload, options: BenchOptions, *, log: Any = None) -> dict[str, Any]:
    """Every measurement of `rehear bench`; the keys of the JSON it writes."""
    from relay.core.config import load_config
    from relay.workbench import endtoend

    def say(text: str) -> None:
        if log is not None:
            print(text, file=log, flush=True)

    result: dict[str, Any] = {"context": _context(workload, options)}
    quick = options.quick
    sample = workload.messages[:100] if quick else workload.messages
    with tempfile.TemporaryDirectory(prefix="rehear-bench-") as tmp:
        messages_file = Path(tmp) / "messages.jsonl"
        messages_file.write_bytes(b"\n".join(sample) + b"\n")
        say("start-up, cold and warm ...")
        result |= startup(workload.config, messages_file, Path(tmp) / "cache")
        say("the chain in process ...")
        result |= in_process(workload.config, sample, passes=1 if quick else max(1, 3000 // len(sample)))
        if options.end_to_end:
            configured = load_config(workload.config).config.limits.chain_runner
            runners = options.runners or (configured,)
            with endtoend.broker(embedded=options.embedded) as found:
                say(f"end to end through {found.kind} (MQTT {found.protocol}) ...")
                cases = {"passthrough": ["passthrough"]} | {
                    runner: ["relay", str(workload.config), runner] for runner in runners}
                runs: dict[str, list[endtoend.RelayRun]] = {name: [] for name in cases}
                for round_ in range(1 if quick else options.repeat):
                    for name, serve in cases.items():
                        runs[name].append(endtoend.measure_relay(
                            found, serve, sample, messages=300 if quick else options.messages,
                            latency_messages=100 if quick else options.latency_messages, rate=options.rate,
                            event_loop=options.event_loop, messages_file=messages_file))
                        say(f"  round {round_ + 1} {name}: {runs[name][-1].msg_s:,.0f} msg/s")
            result |= _end_to_end(runs, runners, found)
        say("the lexicon stage over generated lexicons ...")
        sizes = options.sizes[:1] if quick else options.sizes
        scaled = lexicon_scaling(sizes, messages_file, count=100 if quick else 600)
        result["lexicon"] = {str(size): scaled.get(str(size)) for size in options.sizes}
    result["context"]["load_after"] = [round(v, 2) for v in os.getloadavg()]
    result["context"]["python_loop_us_after"] = python_loop_us()
    return result


def _end_to_end(runs: dict[str, list[Any]], runners: Sequence[str], found: Any) -> dict[str, Any]:
    def median(name: str, key: str) -> float:
        return float(statistics.median(getattr(run, key) for run in runs[name]))

    base = {key: median("passthrough", key) for key in ("msg_s", "cpu_us", "p50_ms", "p99_ms")}

    def added(name: str) -> dict[str, float]:
        """The latency the runner's chain adds to the pass-through's at the fixed rate (us)."""
        return {"p50": round(1000 * (median(name, "p50_ms") - base["p50_ms"]), 1),
                "p99": round(1000 * (median(name, "p99_ms") - base["p99_ms"]), 1)}

    table = {}
    for name in runs:
        table[name] = {"msgs_s": round(median(name, "msg_s"), 1),
                       "msgs_s_range": [round(min(r.msg_s for r in runs[name]), 1),
                                        round(max(r.msg_s for r in runs[name]), 1)],
                       "cpu_us_per_msg": round(median(name, "cpu_us"), 1),
                       "p50_ms": round(median(name, "p50_ms"), 3), "p99_ms": round(median(name, "p99_ms"), 3),
                       "forwarded": int(median(name, "forwarded")), "pss_mb": round(median(name, "pss_mb"), 1)}
        if name != "passthrough":
            table[name]["added_us"] = added(name)
    first = runners[0]
    return {"passthrough_msgs_s": table["passthrough"]["msgs_s"], "chain_msgs_s": table[first]["msgs_s"],
            "throughput_ratio": round(median(first, "msg_s") / base["msg_s"], 3),
            "added_us": added(first), "runners": table, "broker": {"kind": found.kind, "protocol": found.protocol}}


def format_table(result: dict[str, Any]) -> str:
    """The result as a person reads it."""
    context = result["context"]
    lines = [f"rehear bench, {context['date']}, {context['cpus']} cores, load "
             f"{context['load_before'][0]:.2f} before / {context['load_after'][0]:.2f} after; "
             f"{context['workload']}",
             f"this machine's speed, sum(range(100)): {context['python_loop_us_before']:.2f} us before / "
             f"{context['python_loop_us_after']:.2f} us after", ""]
    chain = result["chain_us"]
    lines.append(f"in process, per message (us)   p50 {chain['p50']:>9,.0f}   p99 {chain['p99']:>9,.0f}  whole chain")
    for name, q in result["stage_us"].items():
        lines.append(f"{'':31}p50 {q['p50']:>9,.0f}   p99 {q['p99']:>9,.0f}  {name}")
    if "runners" in result:
        lines += ["", f"end to end ({result['broker']['kind']}, MQTT {result['broker']['protocol']})"
                      "       msg/s        range  % of pass  CPU us/msg   p50 ms   p99 ms   PSS MB",]
        base = result["runners"]["passthrough"]["msgs_s"]
        for name, row in result["runners"].items():
            low, high = row["msgs_s_range"]
            label = name if name == "passthrough" else f"chain, runner {name}"
            lines.append(f"  {label:<36}{row['msgs_s']:>9,.0f} {low:>6,.0f}-{high:<6,.0f}{100 * row['msgs_s'] / base:>8.0f}%"
                         f"{row['cpu_us_per_msg']:>12,.0f}{row['p50_ms']:>9.2f}{row['p99_ms']:>9.2f}"
                         f"{row['pss_mb']:>9.0f}")
        for name, row in result["runners"].items():
            if name != "passthrough":
                added = row["added_us"]
                lines.append(f"  latency the chain adds at the fixed rate, runner {name}: p50 {added['p50']:+,.0f} us, "
                             f"p99 {added['p99']:+,.0f} us")
    lines += ["", "lexicon stage alone, generated lexicon   p50 us    p99 us   cold build s   RSS MB"]
    for size, row in result["lexicon"].items():
        if row is None:
            lines.append(f"  {int(size):>8,} entries                       (not measured)")
            continue
        lines.append(f"  {int(size):>8,} entries                   {row['p50_us']:>9,.0f} {row['p99_us']:>9,.0f}"
                     f" {row['build_s']:>14.2f} {row['rss_mb']:>8.0f}")
    start = result["startup_s"]
    lines += ["", f"start-up: cold {start['cold']:.2f} s, warm {start['warm']:.2f} s; RSS {result['rss_mb']:.0f} MB "
                  f"(peak {result['peak_rss_mb']:.0f} MB)"]
    return "\n".join(lines)


def format_markdown(result: dict[str, Any]) -> str:
    """The result as the rows of the README's table ("Speed on your device")."""
    context = result["context"]
    rows = ["| what | measured |", "|---|---|"]
    chain = result["chain_us"]
    rows.append(f"| chain in process, per message | p50 {chain['p50'] / 1000:.2f} ms, p99 {chain['p99'] / 1000:.2f} ms |")
    for name, q in result["stage_us"].items():
        rows.append(f"| stage `{name}` | p50 {q['p50'] / 1000:.2f} ms, p99 {q['p99'] / 1000:.2f} ms |")
    if "runners" in result:
        base = result["runners"]["passthrough"]
        rows.append(f"| pass-through relay ({result['broker']['kind']}, MQTT {result['broker']['protocol']}) | "
                    f"{base['msgs_s']:,.0f} msg/s, {base['cpu_us_per_msg']:,.0f} us CPU per message, "
                    f"p50 / p99 {base['p50_ms']:.2f} / {base['p99_ms']:.2f} ms at {context.get('rate', 200):g} msg/s |")
        for name, row in result["runners"].items():
            if name == "passthrough":
                continue
            rows.append(f"| relay with the chain, `chain_runner: {name}` | {row['msgs_s']:,.0f} msg/s "
                        f"({100 * row['msgs_s'] / base['msgs_s']:.0f}% of pass-through), "
                        f"{row['cpu_us_per_msg']:,.0f} us CPU per message, p50 / p99 {row['p50_ms']:.2f} / "
                        f"{row['p99_ms']:.2f} ms, PSS {row['pss_mb']:.0f} MB |")
        for name, row in result["runners"].items():
            if name != "passthrough":
                added = row["added_us"]
                rows.append(f"| latency the chain adds at {context.get('rate', 200):g} msg/s, `chain_runner: {name}` | "
                            f"p50 {added['p50'] / 1000:+.2f} ms, p99 {added['p99'] / 1000:+.2f} ms |")
    for size, row in result["lexicon"].items():
        if row is not None:
            rows.append(f"| lexicon stage alone, {int(size):,} generated entries | p50 {row['p50_us'] / 1000:.2f} ms, "
                        f"p99 {row['p99_us'] / 1000:.2f} ms, cold build {row['build_s']:.1f} s, RSS {row['rss_mb']:.0f} MB |")
    start = result["startup_s"]
    rows.append(f"| start-up, cold / warm; RSS | {start['cold']:.2f} / {start['warm']:.2f} s; {result['rss_mb']:.0f} MB |")
    return "\n".join(rows)


def main(argv: list[str] | None = None) -> int:
    """The steps that run in processes of their own (see ``_child``)."""
    args = argparse.ArgumentParser(prog="python -m relay.workbench.bench").parse_known_args(argv)[1]
    step, rest = args[0], args[1:]
    if step == "startup":
        found: dict[str, Any] = _startup_child(*rest)
    elif step == "lexicon-build":
        found = {"build_s": round(build_lexicon(Path(rest[0]), int(rest[1])), 2)}
    elif step == "lexicon-measure":
        times, warm = time_lexicon(Path(rest[0]), _texts(read_messages(Path(rest[1])), int(rest[2])))
        q = _quantiles(times)
        found = {"p50_us": q["p50"], "p99_us": q["p99"], "warm_load_s": round(warm, 2), "rss_mb": _rss_mb()}
    else:
        raise SystemExit(f"unknown bench step {step!r}")
    print(json.dumps(found))
    return 0


if __name__ == "__main__":
    sys.exit(main())

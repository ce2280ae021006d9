"""The plot of cost against lexicon size and N-best length in the docs (docs/img/bench-cost.png).

Left: the lexicon stage alone (default settings) on the workshop example's recorded N-best
lists over generated lexicons of 1k, 10k and 100k entries, p50 and p99, from a
`rehear bench --json` output (or measured here with --sizes). Right: the workshop chain in
process, per stage, on the recorded lists that hold 10 hypotheses, cut to their first 1..10,
p50 per message.

    PYTHONPATH=. python benchmarks/bench_cost_plot.py --bench bench.json
    PYTHONPATH=. python benchmarks/bench_cost_plot.py --sizes 1000 10000   # measure the sizes here
"""

from __future__ import annotations

import argparse
import json
import statistics
import sys
import tempfile
from pathlib import Path
from typing import Any

import orjson

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from relay.workbench.bench import in_process, lexicon_scaling
from relay.workbench.benchdata import example

ROOT = Path(__file__).resolve().parent.parent


def by_length(config: Path, messages: list[bytes], lengths: list[int], passes: int) -> dict[int, dict[str, float]]:
    """p50 per stage (us) of the chain on the 10-hypothesis messages cut to each length."""
    ten = [orjson.loads(m) for m in messages if len(orjson.loads(m)["nbest"]) >= 10]
    out: dict[int, dict[str, float]] = {}
    for length in lengths:
        cut = [orjson.dumps(dict(m, nbest=m["nbest"][:length])) for m in ten]
        found = in_process(config, cut, passes=passes)
        out[length] = {name: q["p50"] for name, q in found["stage_us"].items()}
    return out


def plot(sizes: dict[str, Any], lengths: dict[int, dict[str, float]], output: Path, title: str) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    figure, (left, right) = plt.subplots(1, 2, figsize=(10, 4))
    measured = sorted((int(size), row) for size, row in sizes.items() if row)
    xs = [size for size, _ in measured]
    left.plot(xs, [row["p50_us"] / 1000 for _, row in measured], "o-", label="p50")
    left.plot(xs, [row["p99_us"] / 1000 for _, row in measured], "s--", label="p99")
    left.set_xscale("log")
    left.set_xlabel("lexicon entries (generated)")
    left.set_ylabel("lexicon stage, ms per message")
    left.set_ylim(bottom=0)
    left.set_title("cost against lexicon size")
    left.legend()
    ns = sorted(lengths)
    bottom = [0.0] * len(ns)
    for stage in lengths[ns[0]]:
        values = [lengths[n][stage] / 1000 for n in ns]
        right.bar(ns, values, bottom=bottom, label=stage)
        bottom = [b + v for b, v in zip(bottom, values)]
    right.set_xlabel("hypotheses in the N-best list")
    right.set_ylabel("ms per message (p50 of each stage)")
    right.set_title("workshop chain against N-best length")
    right.legend()
    figure.suptitle(title, fontsize=9)
    figure.tight_layout()
    figure.savefig(output, dpi=110)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--bench", type=Path, help="a `rehear bench --json` output with the lexicon sizes")
    parser.add_argument("--sizes", type=int, nargs="*", default=[], help="measure these lexicon sizes here")
    parser.add_argument("--passes", type=int, default=3, help="timed passes per N-best length")
    parser.add_argument("--output", type=Path, default=ROOT / "docs" / "img" / "bench-cost.png")
    parser.add_argument("--title", default="", help="what machine and when, under the plot")
    args = parser.parse_args(argv)
    with tempfile.TemporaryDirectory() as tmp:
        workload = example(Path(tmp))
        if args.bench is not None:
            sizes = json.loads(args.bench.read_text())["lexicon"]
        else:
            messages_file = Path(tmp) / "messages.jsonl"
            messages_file.write_bytes(b"\n".join(workload.messages) + b"\n")
            sizes = lexicon_scaling(args.sizes or [1000, 10000], messages_file, count=600)
        lengths = by_length(workload.config, workload.messages, list(range(1, 11)), args.passes)
    for n, stages in lengths.items():
        print(f"{n:2d} hypotheses: " + ", ".join(f"{k} {v:.0f} us" for k, v in stages.items())
              + f"; sum {statistics.fsum(stages.values()):.0f} us")
    plot(sizes, lengths, args.output, args.title)
    print(f"wrote {args.output}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

"""Warm start and memory of the whole chain with a 10k-entry lexicon and a ~5 MB language model.

DESIGN target: warm start <= 2 s and <= 200 MB RSS. Builds both inputs in a temporary folder
(seeded), loads the chain once cold (compiles the lexicon cache) and then, in a fresh process,
warm, reporting that process's load time and peak RSS.

    PYTHONPATH=. python benchmarks/bench_footprint.py
"""

from __future__ import annotations

import argparse
import random
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from benchmarks.bench_build_lm import _templated_corpus  # noqa: E402
from relay.workbench.build_lm import build_model  # noqa: E402
from relay.workbench.synthetic import make_lexicon  # noqa: E402

CONFIG = """\
stages:
  - normalize
  - lm_rescore: {model: lm.arpa}
  - lexicon: {lexicon: lexicon.csv, context: {language_model: lm.arpa}}
  - gate
"""


def load_once(folder: Path) -> None:
    """Load the chain in this process and print seconds and peak RSS (MB)."""
    from relay.core.config import build_chain, load_config

    began = time.perf_counter()
    build_chain(load_config(folder / "relay.yaml")).load()
    took = time.perf_counter() - began
    peak_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(f"{took:.2f} {peak_mb:.1f}")


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--entries", type=int, default=10_000)
    parser.add_argument("--lm-words", type=int, default=800_000, help="words of text for the LM (~5 MB ARPA)")
    parser.add_argument("--load", type=Path, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.load:
        load_once(args.load)
        return 0
    with tempfile.TemporaryDirectory(prefix="rehear-footprint-") as name:
        folder = Path(name)
        make_lexicon(args.entries, folder / "lexicon.csv", seed=7)
        _templated_corpus(folder / "text.txt", args.lm_words, random.Random(7))
        build_model(train=folder / "text.txt", output=folder / "lm.arpa", order=3)
        (folder / "relay.yaml").write_text(CONFIG)
        size_mb = (folder / "lm.arpa").stat().st_size / 1e6
        runs = []
        for label in ("cold", "warm", "warm"):
            out = subprocess.run([sys.executable, __file__, "--load", str(folder)], capture_output=True,
                                 text=True, check=True).stdout.split()
            runs.append((label, float(out[0]), float(out[1])))
        print(f"lexicon {args.entries} entries, LM {size_mb:.1f} MB ARPA")
        print("| load | seconds | peak RSS MB |\n|---|---:|---:|")
        for label, seconds, rss in runs:
            print(f"| {label} | {seconds:.2f} | {rss:.0f} |")
        print("targets: warm start <= 2 s, <= 200 MB")
    return 0


if __name__ == "__main__":
    sys.exit(main())

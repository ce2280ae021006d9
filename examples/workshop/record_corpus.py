"""Record the workshop corpus: synthesise each utterance, add noise, recognise it.

Pipeline per utterance (see README.md): flite voice (slt, rms or awb in turn)
reads the text, with lexicon `say` respellings in place of misleading names; sox
resamples to 16 kHz mono 16-bit; a third of the files get pink noise at 25 dB
SNR and a further tenth at 15 dB; pocketsphinx (bundled generic English model,
default settings, fresh decoder per file) returns the top N-best.

Every finished utterance is cached in the work directory, keyed by what was
spoken and how, so an interrupted run resumes where it stopped.

Run from the repository root:
    python -m examples.workshop.record_corpus --jobs 2
"""

from __future__ import annotations

import argparse
import hashlib
import json
import subprocess
import sys
import tempfile
import wave
from concurrent.futures import ProcessPoolExecutor, as_completed
from dataclasses import asdict
from pathlib import Path

import numpy as np
from tqdm import tqdm

from examples.recognise import DEFAULT_TOP, build_message, read_pcm, recognise_pcm
from examples.workshop.plans import Plan, make_plans
from examples.workshop.scenario import HERE, load_phrasings, load_scenario

DEFAULT_SEED = 20261202
DEFAULT_COUNT = 450
NOISE_SECONDS = 120
RECIPE_VERSION = "2"  # 2: the best path's posterior as `conf`


def run(cmd: list[str]) -> None:
    done = subprocess.run(cmd, capture_output=True, text=True, check=False)
    if done.returncode != 0:
        raise RuntimeError(f"{' '.join(cmd)} failed: {done.stderr.strip()}")


def noise_bed(work: Path) -> Path:
    """One long pink-noise recording; utterances take seeded slices of it."""
    path = work / "pinknoise.wav"
    if not path.exists():
        tmp = work / "pinknoise.tmp.wav"
        # -R: repeatable random numbers, so the bed is identical on every machine run.
        run(
            [
                "sox",
                "-R",
                "-n",
                "-r",
                "16000",
                "-c",
                "1",
                "-b",
                "16",
                str(tmp),
                "synth",
                str(NOISE_SECONDS),
                "pinknoise",
                "vol",
                "0.5",
            ]
        )
        tmp.rename(path)
    return path


def add_noise(
    clean: np.ndarray, noise: np.ndarray, snr_db: int, seed: int
) -> np.ndarray:
    """Mix pink noise scaled against the signal's RMS to the requested SNR."""
    rng = np.random.default_rng(seed)
    start = int(rng.integers(0, len(noise) - len(clean)))
    piece = noise[start : start + len(clean)].astype(np.float64)
    signal = clean.astype(np.float64)
    gain = (
        np.sqrt(np.mean(signal**2)) / np.sqrt(np.mean(piece**2)) * 10 ** (-snr_db / 20)
    )
    return np.clip(signal + gain * piece, -32768, 32767).astype(np.int16)


def cache_key(plan: Plan, seed: int) -> str:
    recipe = [RECIPE_VERSION, plan.speak, plan.voice, plan.snr_db, seed, plan.id]
    return hashlib.sha1(json.dumps(recipe).encode()).hexdigest()[:16]


def record_one(plan: Plan, work: str, seed: int, top: int) -> dict:
    """Synthesise, degrade and recognise one utterance; cache and return its N-best."""
    work_dir = Path(work)
    key = cache_key(plan, seed)
    result_path = work_dir / f"{plan.id}-{key}.json"
    if result_path.exists():
        return json.loads(result_path.read_text())
    wav_path = work_dir / f"{plan.id}-{key}.wav"
    with tempfile.TemporaryDirectory(dir=work_dir) as tmp:
        raw = Path(tmp) / "flite.wav"
        run(["flite", "-voice", plan.voice, "-t", plan.speak, "-o", str(raw)])
        run(["sox", str(raw), "-r", "16000", "-c", "1", "-b", "16", str(wav_path)])
    pcm = read_pcm(wav_path)
    if plan.snr_db is not None:
        noise = np.frombuffer(read_pcm(work_dir / "pinknoise.wav"), dtype=np.int16)
        clean = np.frombuffer(pcm, dtype=np.int16)
        pcm = add_noise(
            clean, noise, plan.snr_db, seed + int(plan.id.split("-")[-1])
        ).tobytes()
        write_wav(wav_path, pcm)
    result = {"key": key, "nbest": recognise_pcm(pcm, top)}
    result_path.write_text(json.dumps(result))
    return result


def write_wav(path: Path, pcm: bytes) -> None:
    """Keep the noisy version on disk so the cache holds what was recognised."""
    with wave.open(str(path), "wb") as wav:
        wav.setnchannels(1)
        wav.setsampwidth(2)
        wav.setframerate(16000)
        wav.writeframes(pcm)


def corpus_line(plan: Plan, nbest: list[dict]) -> dict:
    return {
        "id": plan.id,
        "reference": plan.reference,
        "entities": plan.entities,
        "message": build_message(plan.id, nbest, plan.source, plan.speaker),
        "tags": {"voice": plan.voice, "snr_db": plan.snr_db, "split": plan.split},
    }


def parse_args(argv: list[str] | None) -> argparse.Namespace:
    parser = argparse.ArgumentParser(
        description="Synthesise the workshop utterances with flite, add pink noise to some, "
        "recognise them with pocketsphinx and write a labelled corpus (JSON Lines).",
    )
    parser.add_argument(
        "--count",
        type=int,
        default=DEFAULT_COUNT,
        help="utterances to plan (default %(default)s)",
    )
    parser.add_argument(
        "--limit",
        type=int,
        default=None,
        help="record only the first N planned utterances",
    )
    parser.add_argument(
        "--jobs", type=int, default=2, help="parallel recognisers (default %(default)s)"
    )
    parser.add_argument(
        "--seed",
        type=int,
        default=DEFAULT_SEED,
        help="random seed (default %(default)s)",
    )
    parser.add_argument(
        "--top",
        type=int,
        default=DEFAULT_TOP,
        help="N-best entries kept (default %(default)s)",
    )
    parser.add_argument(
        "--scenario",
        type=Path,
        default=HERE,
        help="folder with lexicon.csv, speakers.csv, train.txt, novel_phrasings.txt",
    )
    parser.add_argument(
        "--out",
        type=Path,
        default=HERE / "corpus.jsonl",
        help="output JSON Lines (default %(default)s)",
    )
    parser.add_argument(
        "--work-dir",
        type=Path,
        default=Path(tempfile.gettempdir()) / "rehear-workshop-audio",
        help="audio and result cache, outside git (default %(default)s)",
    )
    parser.add_argument(
        "--plans-only",
        action="store_true",
        help="print the planned utterances and stop",
    )
    return parser.parse_args(argv)


def main(argv: list[str] | None = None) -> int:
    args = parse_args(argv)
    scenario = load_scenario(args.scenario)
    types = {e.type for e in scenario.entries}
    train = load_phrasings(args.scenario / "train.txt", types)
    novel = load_phrasings(args.scenario / "novel_phrasings.txt", types)
    overlap = set(train) & set(novel)
    if overlap:
        print(
            f"novel_phrasings.txt repeats train.txt lines: {sorted(overlap)}",
            file=sys.stderr,
        )
        return 2
    plans = make_plans(scenario, train, novel, args.count, args.seed)[: args.limit]
    if args.plans_only:
        for plan in plans:
            print(json.dumps(asdict(plan)))
        return 0
    args.work_dir.mkdir(parents=True, exist_ok=True)
    noise_bed(args.work_dir)
    results: dict[str, dict] = {}
    with ProcessPoolExecutor(max_workers=args.jobs) as pool:
        futures = {
            pool.submit(record_one, p, str(args.work_dir), args.seed, args.top): p
            for p in plans
        }
        for future in tqdm(
            as_completed(futures), total=len(futures), desc="recording", unit="utt"
        ):
            results[futures[future].id] = future.result()
    args.out.parent.mkdir(parents=True, exist_ok=True)
    with args.out.open("w", encoding="utf-8") as handle:
        for plan in plans:
            handle.write(
                json.dumps(
                    corpus_line(plan, results[plan.id]["nbest"]), ensure_ascii=False
                )
                + "\n"
            )
    print(f"wrote {len(plans)} utterances to {args.out}", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())

"""Record a scenario's corpus: synthesise each utterance, add noise, recognise it.

Pipeline per utterance (see README.md beside this file): a flite voice reads the
text, with lexicon `say` respellings in place of misleading names; sox resamples to
16 kHz mono 16-bit; the part's share of files get noise cut from one seeded noise
bed at the planned SNR; the chosen recogniser returns the top N-best.

The audio is cached in the work directory under a key of what was spoken and how
(text, voice, SNR, noise slice), without the recogniser, so both recognisers hear
the very same samples. Each recogniser's result is cached beside it under a key
that adds the recogniser and its recipe, so an interrupted run resumes where it
stopped and a second recogniser reuses the audio.

Run from the repository root:
    python -m examples.recording.record examples/workshop --part main --recogniser whisper
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import subprocess
import sys
import tempfile
import time
from concurrent.futures import ProcessPoolExecutor, as_completed
from dataclasses import asdict
from pathlib import Path
from typing import Any

import numpy as np
from tqdm import tqdm

from examples.asr import DEFAULT_TOP, RECOGNISERS, build_message, get, read_pcm, write_pcm
from examples.recording.plans import Plan, make_plans
from examples.recording.scenario import (
    Part,
    ScenarioError,
    Settings,
    load_phrasings,
    load_scenario,
    load_settings,
)

NOISE_SECONDS = 120
# Changes whenever the audio for the same plan would change.
AUDIO_RECIPE = "1"


def run(cmd: list[str]) -> None:
    done = subprocess.run(cmd, capture_output=True, text=True, check=False)
    if done.returncode != 0:
        raise RuntimeError(f"{' '.join(cmd)} failed: {done.stderr.strip()}")


def noise_bed(work: Path, kind: str = "pinknoise") -> Path:
    """One long noise recording; utterances take seeded slices of it."""
    path = work / ("pinknoise.wav" if kind == "pinknoise" else f"{kind}.wav")
    if not path.exists():
        tmp = work / f"{kind}.{os.getpid()}.tmp.wav"
        # -R: repeatable random numbers, so the bed is identical on every machine run.
        run(
            ["sox", "-R", "-n", "-r", "16000", "-c", "1", "-b", "16", str(tmp)]
            + ["synth", str(NOISE_SECONDS), kind, "vol", "0.5"]
        )
        tmp.rename(path)
    return path


def add_noise(clean: np.ndarray, noise: np.ndarray, snr_db: int, seed: int) -> np.ndarray:
    """Mix noise scaled against the signal's RMS to the requested SNR."""
    rng = np.random.default_rng(seed)
    start = int(rng.integers(0, len(noise) - len(clean)))
    piece = noise[start : start + len(clean)].astype(np.float64)
    signal = clean.astype(np.float64)
    gain = np.sqrt(np.mean(signal**2)) / np.sqrt(np.mean(piece**2)) * 10 ** (-snr_db / 20)
    return np.clip(signal + gain * piece, -32768, 32767).astype(np.int16)


def noise_seed(plan: Plan, part: Part) -> int:
    return part.seed + int(plan.id.split("-")[-1])


def audio_key(plan: Plan, part: Part, noise: str) -> str:
    recipe = [AUDIO_RECIPE, plan.speak, plan.voice, plan.snr_db, noise, noise_seed(plan, part), plan.id]
    return hashlib.sha1(json.dumps(recipe).encode()).hexdigest()[:16]


def result_key(akey: str, recogniser: str, top: int) -> str:
    recipe = [akey, recogniser, get(recogniser).RECIPE, top]
    return hashlib.sha1(json.dumps(recipe).encode()).hexdigest()[:12]


def make_audio(plan: Plan, part: Part, noise: str, work_dir: Path) -> Path:
    """Synthesise (and degrade) one utterance once; every recogniser reads this file."""
    akey = audio_key(plan, part, noise)
    wav_path = work_dir / f"{plan.id}-{akey}.wav"
    if wav_path.exists():
        return wav_path
    with tempfile.TemporaryDirectory(dir=work_dir) as tmp:
        raw = Path(tmp) / "flite.wav"
        clean_path = Path(tmp) / "clean.wav"
        run(["flite", "-voice", plan.voice, "-t", plan.speak, "-o", str(raw)])
        run(["sox", str(raw), "-r", "16000", "-c", "1", "-b", "16", str(clean_path)])
        pcm = read_pcm(clean_path)
        if plan.snr_db is not None:
            bed = work_dir / ("pinknoise.wav" if noise == "pinknoise" else f"{noise}.wav")
            samples = np.frombuffer(read_pcm(bed), dtype=np.int16)
            clean = np.frombuffer(pcm, dtype=np.int16)
            pcm = add_noise(clean, samples, plan.snr_db, noise_seed(plan, part)).tobytes()
        done = Path(tmp) / "done.wav"
        write_pcm(done, pcm)
        # Atomic: a second recorder working on the same audio never sees half a file.
        os.replace(done, wav_path)
    return wav_path


def prepare_worker(recogniser: str, threads: int | None) -> None:
    get(recogniser).prepare(threads)


def record_one(plan: Plan, part: Part, noise: str, work: str, recogniser: str, top: int) -> dict[str, Any]:
    """Audio (cached or made) -> N-best from one recogniser; cache and return it."""
    work_dir = Path(work)
    akey = audio_key(plan, part, noise)
    rkey = result_key(akey, recogniser, top)
    result_path = work_dir / f"{plan.id}-{akey}.{recogniser}-{rkey}.json"
    if result_path.exists():
        return json.loads(result_path.read_text())
    wav_path = make_audio(plan, part, noise, work_dir)
    module = get(recogniser)
    started = time.perf_counter()
    nbest = module.recognise_pcm(read_pcm(wav_path), top)
    result = {
        "audio": akey,
        "recogniser": recogniser,
        "recipe": module.RECIPE,
        "seconds": round(time.perf_counter() - started, 4),
        "nbest": nbest,
    }
    tmp_path = result_path.with_suffix(f".{os.getpid()}.tmp")
    tmp_path.write_text(json.dumps(result))
    os.replace(tmp_path, result_path)
    return result


def corpus_line(plan: Plan, nbest: list[dict[str, Any]], recogniser: str | None) -> dict[str, Any]:
    tags: dict[str, Any] = {"voice": plan.voice, "snr_db": plan.snr_db, "split": plan.split}
    if recogniser is not None:
        tags["recogniser"] = recogniser
    return {
        "id": plan.id,
        "reference": plan.reference,
        "entities": plan.entities,
        "message": build_message(plan.id, nbest, plan.source, plan.speaker),
        "tags": tags,
    }


def parse_args(argv: list[str] | None) -> argparse.Namespace:
    parser = argparse.ArgumentParser(
        description="Synthesise a scenario's utterances with flite, add noise to some, recognise "
        "them and write a labelled corpus (JSON Lines, FORMATS section 5).",
    )
    parser.add_argument(
        "scenario",
        type=Path,
        help="scenario folder with scenario.yaml, lexicon.csv, speakers.csv, "
        "devices.csv, train.txt, novel_phrasings.txt",
    )
    parser.add_argument(
        "--part", default="main", help="part of scenario.yaml to record (default %(default)s)"
    )
    parser.add_argument(
        "--recogniser",
        choices=sorted(RECOGNISERS),
        default="pocketsphinx",
        help="recogniser (default %(default)s)",
    )
    parser.add_argument("--limit", type=int, default=None, help="record only the first N planned utterances")
    parser.add_argument(
        "--jobs", type=int, default=2, help="parallel recogniser processes (default %(default)s)"
    )
    parser.add_argument(
        "--threads",
        type=int,
        default=None,
        help="CPU threads per recogniser process (Whisper only; default: cores / jobs)",
    )
    parser.add_argument(
        "--top", type=int, default=DEFAULT_TOP, help="N-best entries kept (default %(default)s)"
    )
    parser.add_argument(
        "--out", type=Path, default=None, help="output JSON Lines (default: from scenario.yaml)"
    )
    parser.add_argument(
        "--work-dir",
        type=Path,
        default=None,
        help="audio and result cache, outside git (default: $TMPDIR/rehear-<scenario>-audio)",
    )
    parser.add_argument("--plans-only", action="store_true", help="print the planned utterances and stop")
    parser.add_argument("--audio-only", action="store_true", help="synthesise the audio, recognise nothing")
    return parser.parse_args(argv)


def load_plans(folder: Path, part_name: str, limit: int | None = None) -> tuple[Settings, Part, list[Plan]]:
    """The settings, the part and its plans for a scenario folder."""
    scenario = load_scenario(folder)
    settings = load_settings(folder, {e.id for e in scenario.entries})
    if part_name not in settings.parts:
        raise ScenarioError(f"{folder}/scenario.yaml has no part {part_name!r} ({', '.join(settings.parts)})")
    part = settings.parts[part_name]
    types = {e.type for e in scenario.entries}
    train = load_phrasings(folder / "train.txt", types)
    novel = load_phrasings(folder / "novel_phrasings.txt", types)
    overlap = set(train) & set(novel)
    if overlap:
        raise ScenarioError(f"novel_phrasings.txt repeats train.txt lines: {sorted(overlap)}")
    return settings, part, make_plans(scenario, train, novel, settings, part, limit)


def main(argv: list[str] | None = None) -> int:
    args = parse_args(argv)
    try:
        settings, part, plans = load_plans(args.scenario, args.part, args.limit)
    except ScenarioError as exc:
        print(exc, file=sys.stderr)
        return 2
    if args.plans_only:
        for plan in plans:
            print(json.dumps(asdict(plan)))
        return 0
    work_dir = args.work_dir or Path(tempfile.gettempdir()) / f"rehear-{settings.name}-audio"
    work_dir.mkdir(parents=True, exist_ok=True)
    noise_bed(work_dir, settings.noise)
    if args.audio_only:
        for plan in tqdm(plans, desc="synthesising", unit="utt"):
            make_audio(plan, part, settings.noise, work_dir)
        return 0
    threads = args.threads or max(1, (os.cpu_count() or 1) // max(args.jobs, 1))
    results: dict[str, dict[str, Any]] = {}
    with ProcessPoolExecutor(
        max_workers=args.jobs, initializer=prepare_worker, initargs=(args.recogniser, threads)
    ) as pool:
        futures = {
            pool.submit(record_one, p, part, settings.noise, str(work_dir), args.recogniser, args.top): p
            for p in plans
        }
        for future in tqdm(as_completed(futures), total=len(futures), desc="recording", unit="utt"):
            results[futures[future].id] = future.result()
    output = part.outputs.get(args.recogniser)
    out = args.out or (settings.folder / output.file if output else None)
    if out is None:
        print(f"part {part.name!r} names no corpus file for {args.recogniser}; use --out", file=sys.stderr)
        return 2
    tag = args.recogniser if output is None or output.tag_recogniser else None
    out.parent.mkdir(parents=True, exist_ok=True)
    with out.open("w", encoding="utf-8") as handle:
        for plan in plans:
            line = corpus_line(plan, results[plan.id]["nbest"], tag)
            handle.write(json.dumps(line, ensure_ascii=False) + "\n")
    seconds = [r["seconds"] for r in results.values() if "seconds" in r]
    if seconds:
        print(
            f"recognition: median {float(np.median(seconds)):.3f} s per file "
            f"({len(seconds)} timed, {args.jobs} process(es) x {threads} thread(s))",
            file=sys.stderr,
        )
    print(f"wrote {len(plans)} utterances to {out}", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())

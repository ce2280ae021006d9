"""Recognise speech with pocketsphinx or Whisper and publish N-best messages over MQTT.

Input is WAV files (16 kHz mono 16-bit; convert others with
`sox in.wav -r 16000 -c 1 -b 16 out.wav`) or, with --mic, fixed-length takes
from the default microphone via sounddevice. Each result is published as one
recogniser message (FORMATS section 1) on `asr/<source>/nbest` with QoS 1.
Recognition is the same code the example corpora were recorded with
(examples/asr).

    python -m examples.bridge examples/workshop/some.wav --source bench-2
    python -m examples.bridge --recogniser whisper some.wav --source slipway-panel
    python -m examples.bridge --mic --takes 3 --seconds 4
"""

from __future__ import annotations

import argparse
import asyncio
import json
import sys
from pathlib import Path

from examples.asr import (
    DEFAULT_TOP,
    RECOGNISERS,
    SAMPLE_RATE,
    AudioFormatError,
    build_message,
    get,
    read_pcm,
)


def parse_args(argv: list[str] | None) -> argparse.Namespace:
    parser = argparse.ArgumentParser(
        description="Recognise WAV files or microphone takes with pocketsphinx (generic English "
        "model, default settings) or Whisper tiny.en and publish each N-best list as a JSON "
        "message on MQTT.",
    )
    parser.add_argument(
        "--recogniser",
        choices=sorted(RECOGNISERS),
        default="pocketsphinx",
        help="recogniser (default %(default)s)",
    )
    parser.add_argument(
        "wavs",
        nargs="*",
        type=Path,
        help="16 kHz mono 16-bit WAV files, one utterance each",
    )
    parser.add_argument(
        "--mic",
        action="store_true",
        help="record takes from the default microphone instead",
    )
    parser.add_argument(
        "--takes",
        type=int,
        default=1,
        help="microphone takes to record (default %(default)s)",
    )
    parser.add_argument(
        "--seconds",
        type=float,
        default=4.0,
        help="length of one microphone take (default %(default)s)",
    )
    parser.add_argument("--host", default="127.0.0.1", help="MQTT broker host (default %(default)s)")
    parser.add_argument("--port", type=int, default=1883, help="MQTT broker port (default %(default)s)")
    parser.add_argument(
        "--topic",
        default="asr/{source}/nbest",
        help="topic template; {source} is filled in (default %(default)s)",
    )
    parser.add_argument(
        "--source",
        default="bench-1",
        help="device name put in messages and topic (default %(default)s)",
    )
    parser.add_argument("--speaker", default=None, help="speaker id to put in messages, if known")
    parser.add_argument(
        "--top",
        type=int,
        default=DEFAULT_TOP,
        help="N-best entries to publish (default %(default)s)",
    )
    parser.add_argument("--print", dest="echo", action="store_true", help="also print each message")
    args = parser.parse_args(argv)
    if args.mic == bool(args.wavs):
        parser.error("give WAV files or --mic (not both)")
    if not 1 <= args.top <= 50:
        parser.error("--top must be within 1..50 (the message format allows at most 50)")
    return args


def microphone_takes(takes: int, seconds: float):
    """Yield (id suffix, pcm) for each take; explains clearly when no microphone exists."""
    try:
        import sounddevice
    except (ImportError, OSError) as exc:
        # sounddevice needs the PortAudio shared library, which headless machines lack.
        raise SystemExit(
            f"no microphone support here: sounddevice unavailable ({exc}); use WAV files"
        ) from exc
    for take in range(1, takes + 1):
        print(f"take {take}/{takes}: speak now for {seconds:g} s", file=sys.stderr)
        audio = sounddevice.rec(
            int(seconds * SAMPLE_RATE),
            samplerate=SAMPLE_RATE,
            channels=1,
            dtype="int16",
        )
        sounddevice.wait()
        yield f"mic{take:04d}", audio.tobytes()


def wav_takes(paths: list[Path]):
    for path in paths:
        try:
            yield path.stem, read_pcm(path)
        except (AudioFormatError, FileNotFoundError) as exc:
            raise SystemExit(str(exc)) from exc


async def publish_all(args: argparse.Namespace) -> int:
    import aiomqtt

    topic = args.topic.format(source=args.source)
    takes = microphone_takes(args.takes, args.seconds) if args.mic else wav_takes(args.wavs)
    recogniser = get(args.recogniser)
    # Load the model (Whisper) once, before the first take.
    await asyncio.to_thread(recogniser.prepare)
    sent = 0
    async with aiomqtt.Client(args.host, port=args.port) as client:
        for suffix, pcm in takes:
            nbest = await asyncio.to_thread(recogniser.recognise_pcm, pcm, args.top)
            message = build_message(f"{args.source}-{suffix}", nbest, args.source, args.speaker)
            payload = json.dumps(message, ensure_ascii=False)
            await client.publish(topic, payload, qos=1)
            sent += 1
            if args.echo:
                print(payload)
    print(f"published {sent} message(s) on {topic}", file=sys.stderr)
    return 0


def main(argv: list[str] | None = None) -> int:
    args = parse_args(argv)
    import aiomqtt

    try:
        return asyncio.run(publish_all(args))
    except (OSError, aiomqtt.MqttError) as exc:
        print(
            f"cannot reach MQTT broker at {args.host}:{args.port}: {exc}",
            file=sys.stderr,
        )
        return 1


if __name__ == "__main__":
    sys.exit(main())

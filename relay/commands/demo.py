"""`rehear demo`: the whole relay on one machine, with nothing but Python.

Starts an embedded MQTT broker on a free loopback port (or uses --broker), the relay with the
example configuration, a publisher replaying example recogniser messages and a downstream
subscriber that prints, per utterance, what was heard, what was sent on and the decision.
"""

from __future__ import annotations

import argparse
import asyncio
import base64
import re
import statistics
import sys
import time
from collections import Counter
from pathlib import Path
from typing import Any

import aiomqtt
import orjson
from prometheus_client import CollectorRegistry

from relay.commands.run import run_coroutine, serve
from relay.embedded_broker import EmbeddedBroker
from relay.errors import RehearError
from relay.health import HealthServer
from relay.service import Active, Relay, load_active

__all__ = ["add_parser", "run"]

_EXAMPLES = Path(__file__).resolve().parents[2] / "examples" / "demo"
_PLACEHOLDER = re.compile(r"\{(source|speaker|decision)\}")


def add_parser(subparsers: Any) -> argparse.ArgumentParser:
    parser: argparse.ArgumentParser = subparsers.add_parser(
        "demo",
        help="run broker, relay, recogniser and NLU stand-ins on this machine and show what happens",
        description=(
            "Start an embedded MQTT broker (or use --broker), the relay with the example configuration, "
            "replay example recogniser messages and print, per utterance, what was heard, what was sent "
            "on and the decision. Ends with a summary."
        ),
    )
    parser.add_argument("--broker", metavar="HOST:PORT", help="use this broker instead of the embedded one")
    parser.add_argument("--config", type=Path, default=_EXAMPLES / "relay.yaml", help="relay configuration")
    parser.add_argument("--messages", type=Path, default=_EXAMPLES / "messages.jsonl",
                        help="recogniser messages to replay, one per line (JSON Lines)")
    parser.add_argument("--interval", type=float, default=0.1, help="seconds between messages (default 0.1)")
    parser.add_argument("--timeout", type=float, default=5.0, help="seconds to wait for each result")
    parser.add_argument("--linger", type=float, default=0.0,
                        help="keep the relay and its /metrics up this many seconds after the summary")
    parser.set_defaults(handler=run)
    return parser


def _subscription(template: str) -> str:
    return _PLACEHOLDER.sub("+", template)


def _heard(payload: bytes) -> str:
    try:
        message = orjson.loads(payload)
        return str(message["nbest"][0]["text"])
    except (orjson.JSONDecodeError, KeyError, IndexError, TypeError):
        return payload[:60].decode("utf-8", "replace")


def _describe(topic: str, payload: bytes, dead_letter_topic: str) -> tuple[str, str]:
    """(kind, line) for one message the downstream subscriber received."""
    if topic == dead_letter_topic:
        envelope = orjson.loads(payload)
        original = base64.b64decode(envelope.get("payload_b64", "")) if "payload_b64" in envelope else payload
        return "dead_letter", f"dead letter ({envelope.get('reason')}): {envelope.get('detail')} [{len(original)} bytes kept]"
    message = orjson.loads(payload)
    relay = message.get("relay")
    if relay is None:
        return "partial", "partial result, forwarded untouched"
    if "passthrough" in relay:
        return "passthrough", f"sent on unchanged ({relay['passthrough']}): \"{message.get('text')}\""
    if "prompt" in message and "nbest" not in message:
        return "prompt", f"asks back: \"{message['prompt']}\""
    decision = message.get("decision") or "none (no gate in this chain)"
    corrections = len(message.get("corrections", []))
    return "cleaned", f"sent on: \"{message.get('text')}\"  decision: {decision}  corrections: {corrections}  -> {topic}"


async def _demo(args: argparse.Namespace, active: Active, out: Any) -> int:
    config = active.loaded.config
    lines = [line for line in args.messages.read_text(encoding="utf-8").splitlines() if line.strip()]
    broker: EmbeddedBroker | None = None
    if args.broker:
        host, _, port = args.broker.rpartition(":")
        config.broker = config.broker.model_copy(update={"host": host or "127.0.0.1", "port": int(port)})
    else:
        broker = EmbeddedBroker()
        await broker.start()
        config.broker = config.broker.model_copy(update={"host": broker.host, "port": broker.port, "protocol": "3.1.1"})
        print(f"embedded MQTT broker (3.1.1) on {broker.address}", file=out)
    ready: asyncio.Future[tuple[Relay, HealthServer | None]] = asyncio.get_running_loop().create_future()

    def on_ready(relay: Relay, health: HealthServer | None) -> None:
        ready.set_result((relay, health))

    registry = CollectorRegistry()
    relay_task = asyncio.create_task(serve(active, metrics_port=0 if config.metrics.port == 0 else None,
                                           registry=registry, on_ready=on_ready, signals=False))
    kinds: Counter[str] = Counter()
    latencies: list[float] = []
    try:
        relay, health = await asyncio.wait_for(asyncio.shield(ready), timeout=10)
        metrics_address = f"{health.address}/metrics" if health else "(metrics disabled)"
        print(f"relay: stages {' -> '.join(active.chain.names)}, metrics at {metrics_address}\n", file=out)
        topics = config.topics
        async with aiomqtt.Client(config.broker.host, config.broker.port, identifier=f"rehear-demo-nlu-{time.time_ns()}") as client:
            await client.subscribe([(_subscription(topics.output), 1), (_subscription(topics.prompt), 1),
                                    (topics.dead_letter, 1)])
            for _ in range(100):  # the relay subscribes on connect; wait for it (bounded)
                if relay.connected:
                    break
                await asyncio.sleep(0.05)
            input_topic = _subscription(topics.inputs[0]).replace("+", "kiosk").replace("#", "demo")
            for number, line in enumerate(lines, 1):
                payload = line.encode("utf-8")
                print(f"[{number}] heard:   \"{_heard(payload)}\"", file=out)
                sent = time.monotonic()
                await client.publish(input_topic, payload, qos=1)
                try:
                    async with asyncio.timeout(args.timeout):
                        message = await anext(aiter(client.messages))
                except TimeoutError:
                    print("    no result within the timeout", file=out)
                    kinds["missing"] += 1
                    continue
                latencies.append(time.monotonic() - sent)
                kind, text = _describe(message.topic.value, message.payload, topics.dead_letter)
                kinds[kind] += 1
                print(f"    {text}", file=out)
                await asyncio.sleep(args.interval)
        print("\nsummary: " + ", ".join(f"{count} {kind}" for kind, count in sorted(kinds.items()))
              + f" of {len(lines)} messages", file=out)
        if latencies:
            print(f"round trip recogniser -> relay -> NLU: median {statistics.median(latencies) * 1000:.1f} ms,"
                  f" max {max(latencies) * 1000:.1f} ms", file=out)
        print(f"metrics: {metrics_address}" + (f" (up for {args.linger:g} s more)" if args.linger else
                                                " (served while the demo runs; --linger keeps it up)"), file=out)
        if args.linger:
            await asyncio.sleep(args.linger)
        relay.request_stop()
        await relay_task
    finally:
        if not relay_task.done():
            relay_task.cancel()
            await asyncio.gather(relay_task, return_exceptions=True)
        if broker is not None:
            await broker.stop()
    return 0 if kinds["missing"] == 0 else 1


def run(args: argparse.Namespace) -> int:
    try:
        active = load_active(args.config)
    except RehearError as exc:
        print(exc, file=sys.stderr)
        return 2
    except FileNotFoundError as exc:
        print(f"demo file missing: {exc.filename}", file=sys.stderr)
        return 2
    if not args.messages.exists():
        print(f"demo messages missing: {args.messages}", file=sys.stderr)
        return 2
    result: int = run_coroutine(_demo(args, active, sys.stdout))
    return result


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="rehear")
    add_parser(parser.add_subparsers(dest="command", required=True))
    return run(parser.parse_args(["demo", *(sys.argv[1:] if argv is None else argv)]))


if __name__ == "__main__":
    sys.exit(main())

"""The demo: the whole relay on one machine, with nothing but Python.

Starts an embedded MQTT broker on a free loopback port (or uses a given one), the relay with
the example configuration, a publisher replaying recorded recogniser messages and a downstream
subscriber that prints, per utterance, what was heard, what was sent on, the decision with the
rule and confidence behind it, and whether the entities sent on are the ones said. The gate is
about entities, so that is what the summary scores: an exact transcript matters less than the
right machine, person or place.
"""

from __future__ import annotations

import asyncio
import re
import socket
import statistics
import time
from collections import Counter
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import aiomqtt
import orjson
from prometheus_client import CollectorRegistry

from relay.live.active import Active
from relay.live.embedded_broker import EmbeddedBroker
from relay.live.health import HealthServer
from relay.live.serve import serve
from relay.live.service import Relay
from relay.live.topics import sanitize_level
from stages.normalize.tokens import tokenize

__all__ = ["DemoOptions", "play"]

_PLACEHOLDER = re.compile(r"\{(source|speaker|decision)\}")


@dataclass(frozen=True, slots=True)
class DemoOptions:
    """What to replay and how (see `rehear demo --help`)."""

    corpus: Path
    messages: Path
    count: int = 20
    interval: float = 0.1
    timeout: float = 5.0
    linger: float = 0.0
    broker: str | None = None  # HOST:PORT of a broker to use instead of the embedded one


def _subscription(template: str) -> str:
    return _PLACEHOLDER.sub("+", template)


@dataclass
class _Item:
    payload: bytes
    said: str | None = None  # the reference, when the line comes from a labelled corpus
    entities: frozenset[str] | None = None  # the entity ids said, from the same line


def _items(args: DemoOptions) -> list[_Item]:
    """Corpus utterances spread evenly over the file, then the hand-written edge cases."""
    items: list[_Item] = []
    if args.count > 0 and args.corpus.exists():
        lines = [orjson.loads(line) for line in args.corpus.read_bytes().splitlines() if line.strip()]
        step = max(1, len(lines) // args.count)
        for line in lines[::step][: args.count]:
            said = frozenset(e["id"] for e in line.get("entities", []))
            items.append(_Item(orjson.dumps(line["message"]), said=line.get("reference"), entities=said))
    if args.messages.exists():
        items += [_Item(line.encode("utf-8")) for line in args.messages.read_text("utf-8").splitlines() if line.strip()]
    return items


def _source(payload: bytes) -> str | None:
    try:
        message = orjson.loads(payload)
    except orjson.JSONDecodeError:
        return None
    source = message.get("source") if isinstance(message, dict) else None
    return source if isinstance(source, str) else None


def _heard(payload: bytes) -> str:
    try:
        message = orjson.loads(payload)
        return str(message["nbest"][0]["text"])
    except (orjson.JSONDecodeError, KeyError, IndexError, TypeError):
        return payload[:60].decode("utf-8", "replace")


def _kind(topic: str, message: dict[str, Any] | None, topics: Any) -> str:
    if topic == topics.dead_letter:
        return "dead_letter"
    if message is None:
        return "unreadable"
    relay = message.get("relay")
    if relay is None:
        return "partial"
    if "passthrough" in relay:
        return "passthrough"
    if "prompt" in message and "nbest" not in message:
        return "prompt"
    return "cleaned"


async def _results(client: aiomqtt.Client, topics: Any) -> list[tuple[str, str, dict[str, Any] | None, bytes]]:
    """What the downstream side receives for one input: the result and, if any, the prompt."""
    got: list[tuple[str, str, dict[str, Any] | None, bytes]] = []
    while True:
        message = await anext(aiter(client.messages))
        topic = message.topic.value
        payload = message.payload if isinstance(message.payload, bytes) else str(message.payload).encode()
        try:
            body = orjson.loads(payload) if topic != topics.dead_letter or payload[:1] == b"{" else None
        except orjson.JSONDecodeError:
            body = None
        kind = _kind(topic, body, topics)
        got.append((kind, topic, body, payload))
        asks_back = kind == "cleaned" and body is not None and body.get("decision") in ("confirm", "reprompt")
        if not asks_back or body is None or not body.get("prompt"):
            return got


def _print_result(item: _Item, got: list[tuple[str, str, dict[str, Any] | None, bytes]], out: Any) -> str:
    """Print what happened to one input; returns its kind for the summary."""
    kind = got[0][0]
    for each, topic, body, _payload in got:
        if each == "dead_letter":
            detail = body.get("detail") if body else "(reason in MQTT 5 user properties)"
            reason = body.get("reason") if body else "?"
            print(f"    dead letter ({reason}): {detail}", file=out)
        elif each == "partial":
            print("    partial result, forwarded untouched", file=out)
        elif each == "passthrough" and body is not None:
            print(f"    sent on unchanged ({body['relay']['passthrough']}): \"{body.get('text')}\"", file=out)
        elif each == "prompt" and body is not None:
            print(f"    asks back on {topic}: \"{body['prompt']}\"", file=out)
        elif body is not None:
            decision = body.get("decision") or "none (no gate in this chain)"
            print(f"    sent on: \"{body.get('text')}\"  [{decision}{_why(body)}]", file=out)
            for fix in body.get("corrections", []):
                print(f"      fixed: \"{fix['before']}\" -> \"{fix['after']}\" ({fix['score']:.2f})", file=out)
            if item.entities is not None:
                found = frozenset(e["id"] for e in body.get("entities", []))
                right = found == item.entities
                shown = ", ".join(sorted(found)) or "none"
                verdict = "right" if right else f"wrong, said {', '.join(sorted(item.entities)) or 'none'}"
                print(f"      entities: {shown} ({verdict})", file=out)
                exact = item.said is not None and tokenize(body.get("text", "")) == tokenize(item.said)
                kind = f"{decision}:{'right' if right else 'wrong'}:{'exact' if exact else 'inexact'}"
    return kind


def _why(body: dict[str, Any]) -> str:
    """The gate's rule and confidence, from its trace entry in the cleaned message."""
    for entry in reversed(body.get("trace") or []):
        scores = entry.get("scores") or {}
        if "rule" in scores:
            confidence = scores.get("confidence")
            sure = f", confidence {confidence:.0%}" if isinstance(confidence, float) else ""
            return f" by {scores['rule']}{sure}"
    return ""


async def play(args: DemoOptions, active: Active, out: Any) -> int:
    """Start the broker (unless ``args.broker``) and the relay, replay the messages, print what
    happens to each and a summary; 0 when every message got its result."""
    config = active.loaded.config
    items = _items(args)
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
    relay_task = asyncio.create_task(serve(active, metrics_port=0,
                                           registry=registry, on_ready=on_ready, signals=False))
    kinds: Counter[str] = Counter()
    latencies: list[float] = []
    first_right = 0
    try:
        relay, health = await asyncio.wait_for(asyncio.shield(ready), timeout=30)
        metrics_address = f"{health.address}/metrics" if health else "(metrics disabled)"
        print(f"relay: stages {' -> '.join(active.chain.names)}, metrics at {metrics_address}\n", file=out)
        topics = config.topics
        # TCP_NODELAY here too: back-to-back small publishes otherwise wait on delayed ACKs (~40 ms).
        async with aiomqtt.Client(config.broker.host, config.broker.port, identifier=f"rehear-demo-nlu-{time.time_ns()}",
                                  socket_options=[(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)]) as client:
            await client.subscribe([(_subscription(topics.output), 1), (_subscription(topics.prompt), 1),
                                    (topics.dead_letter, 1)])
            for _ in range(100):  # the relay subscribes on connect; wait for it (bounded)
                if relay.connected:
                    break
                await asyncio.sleep(0.05)
            input_filter = _subscription(topics.inputs[0])
            for number, item in enumerate(items, 1):
                print(f"[{number}] " + (f"said:    \"{item.said}\"\n    " if item.said else "")
                      + f"heard:   \"{_heard(item.payload)}\"", file=out)
                if item.said is not None and tokenize(_heard(item.payload)) == tokenize(item.said):
                    first_right += 1
                sent = time.monotonic()
                # Each device publishes on its own topic, as the broker's ACL would have it; the
                # relay takes the source from there (topics.source_level).
                level = sanitize_level(_source(item.payload) or "kiosk")
                await client.publish(input_filter.replace("+", level).replace("#", level), item.payload, qos=1)
                try:
                    async with asyncio.timeout(args.timeout):
                        got = await _results(client, topics)
                except TimeoutError:
                    print("    no result within the timeout", file=out)
                    kinds["missing"] += 1
                    continue
                latencies.append(time.monotonic() - sent)
                kinds[_print_result(item, got, out)] += 1
                await asyncio.sleep(args.interval)
        _summary(kinds, latencies, first_right, len(items), out)
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


def _summary(kinds: Counter[str], latencies: list[float], first_right: int, total: int, out: Any) -> None:
    labelled = {k: n for k, n in kinds.items() if k.count(":") == 2}
    print(f"\nsummary of {total} messages:", file=out)
    if labelled:
        count = sum(labelled.values())
        right = sum(n for k, n in labelled.items() if ":right:" in k)
        exact = sum(n for k, n in labelled.items() if k.endswith(":exact"))
        print(f"  recorded utterances: {count}; the entities sent on are the ones said in {right}; the text "
              f"is word for word right in {exact} (the recogniser's first hypothesis: {first_right})", file=out)
        for decision in ("accept", "confirm", "reprompt"):
            ok = sum(n for k, n in labelled.items() if k.startswith(f"{decision}:right:"))
            bad = sum(n for k, n in labelled.items() if k.startswith(f"{decision}:wrong:"))
            if ok or bad:
                print(f"    {decision:<9} {ok + bad:>3}  ({ok} with the right entities, {bad} wrong)", file=out)
        wrong_accepts = sum(n for k, n in labelled.items() if k.startswith("accept:wrong:"))
        print(f"  wrong accepts (accepted with the wrong entities): {wrong_accepts}", file=out)
    others = {k: n for k, n in kinds.items() if ":" not in k}
    if others:
        print("  other messages: " + ", ".join(f"{n} {k.replace('_', ' ')}" for k, n in sorted(others.items())), file=out)
    if latencies:
        print(f"  round trip recogniser -> relay -> NLU: median {statistics.median(latencies) * 1000:.1f} ms,"
              f" max {max(latencies) * 1000:.1f} ms", file=out)



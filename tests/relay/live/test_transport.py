from __future__ import annotations

import asyncio

import aiomqtt
import pytest
from hypothesis import given
from hypothesis import strategies as st

from relay.core.errors import PublishRefused
from relay.core.settings import BrokerSettings
from relay.live.topics import render_topic, sanitize_level, source_from_topic
from relay.live.transport import AckQueue, Delivery, Session


@given(st.one_of(st.none(), st.text(), st.integers()), st.one_of(st.none(), st.text()))
def test_rendered_topics_never_hold_wildcards_empty_levels_nul_or_extra_levels(source: object, speaker: object) -> None:
    topic = render_topic("nlu/{source}/{speaker}/in", {"source": source, "speaker": speaker})
    levels = topic.split("/")
    assert len(levels) == 4  # no '/' injected through a value
    assert all(levels)  # no empty level
    assert not set("+#\x00") & set(topic)
    assert not levels[1].startswith("$")
    topic.encode("utf-8")  # always encodable, even from lone surrogates


def test_sanitize_level_examples() -> None:
    assert sanitize_level("kiosk-3") == "kiosk-3"
    assert sanitize_level("a/b") == "a_b"
    assert sanitize_level("+") == "_"
    assert sanitize_level("#") == "_"
    assert sanitize_level("") == "_"
    assert sanitize_level(None) == "_"
    assert sanitize_level("$SYS") == "_SYS"
    assert sanitize_level("x\x00y") == "x_y"
    assert len(sanitize_level("x" * 500)) == 128
    assert sanitize_level("\ud800") == "_"
    # MQTT 5.0 section 1.5.4 and mosquitto's mosquitto_validate_utf8: C1 controls and
    # non-characters make a malformed packet
    assert sanitize_level("a\x85b\x9f") == "a_b_"
    assert sanitize_level("\ufdd0\ufdef\ufffe\uffff\U0001fffe\U0010ffff") == "______"
    assert sanitize_level("\x7f") == "_"
    assert sanitize_level("caf\u00e9 \u00a0\u4e2d") == "caf\u00e9 \u00a0\u4e2d"  # ordinary text stays


def _broker_accepts(text: str) -> bool:
    """mosquitto 2.0's mosquitto_validate_utf8 (lib/utf8_mosq.c), restated: well-formed UTF-8 with
    no U+0000-U+001F, U+007F-U+009F, surrogates, U+FDD0-U+FDEF or U+xFFFE/U+xFFFF."""
    for char in text:
        point = ord(char)
        if point <= 0x1F or 0x7F <= point <= 0x9F or 0xD800 <= point <= 0xDFFF or 0xFDD0 <= point <= 0xFDEF:
            return False
        if point & 0xFFFF in (0xFFFE, 0xFFFF):
            return False
    return True


@given(st.text(alphabet=st.characters(codec=None), max_size=300))
def test_a_sanitised_level_is_always_one_level_the_broker_accepts(value: str) -> None:
    level = sanitize_level(value)
    assert _broker_accepts(level) and not set("+#/") & set(level)
    assert 1 <= len(level) <= 128 and len(level.encode("utf-8")) <= 512


def test_render_topic_fills_every_placeholder() -> None:
    assert render_topic("nlu/{source}/in", {"source": "kiosk-1"}) == "nlu/kiosk-1/in"
    assert render_topic("d/{decision}", {"decision": None}) == "d/_"


def _delivery(mid: int) -> Delivery:
    return Delivery(topic="t", payload=b"", qos=1, mid=mid, generation=1)


def test_ack_queue_releases_in_arrival_order() -> None:
    queue = AckQueue()
    first, second, third = _delivery(1), _delivery(2), _delivery(3)
    for delivery in (first, second, third):
        queue.add(delivery)
    assert queue.finish(third) == []
    assert queue.finish(first) == [first]
    assert queue.finish(second) == [second, third]
    assert not queue.pending


def test_the_source_comes_from_the_level_the_filter_leaves_open() -> None:
    filters = ["workshop/+/asr", "$share/relays/site/+/+/asr"]
    assert source_from_topic("workshop/bench-1/asr", filters, "auto") == "bench-1"
    assert source_from_topic("site/hall/kiosk-2/asr", filters, "auto") == "hall"  # the first +, $share skipped
    assert source_from_topic("site/hall/kiosk-2/asr", filters, 2) == "kiosk-2"
    assert source_from_topic("workshop/bench-1/asr", filters, "none") is None
    assert source_from_topic("other/bench-1/asr", filters, "auto") is None
    assert source_from_topic("fixed/asr", ["fixed/asr"], "auto") is None  # no wildcard: the payload says


def test_the_source_of_a_topic_seen_before_still_follows_the_filters_and_the_setting() -> None:
    # answers are remembered per topic: asked again with other filters or another setting, the
    # answer must be theirs (a reload may change both)
    for _ in range(2):
        assert source_from_topic("site/hall/kiosk-2/asr", ["site/+/+/asr"], "auto") == "hall"
        assert source_from_topic("site/hall/kiosk-2/asr", ["site/+/+/asr"], 2) == "kiosk-2"
        assert source_from_topic("site/hall/kiosk-2/asr", ["site/hall/+/asr"], "auto") == "kiosk-2"
        assert source_from_topic("site/hall/kiosk-2/asr", ["other/+/asr"], "auto") is None
    long_source = "k" * 300  # past the topics remembered: the same answers, worked out each time
    for _ in range(2):
        assert source_from_topic(f"workshop/{long_source}/asr", ["workshop/+/asr"], "auto") == long_source
        assert source_from_topic(f"workshop/{long_source}/asr", ["other/+/asr"], "auto") is None


class _Sent:
    """What paho's publish() returns: queued fine, with a packet id."""

    def __init__(self, mid: int) -> None:
        self.rc = 0
        self.mid = mid


def _session_publishing(verdicts: dict[int, int | None], *, early: bool = False, timeout: float = 10.0) -> Session:
    """A Session, never connected, whose paho client answers publish number N with the PUBACK
    reason code ``verdicts[N]`` on the next pass of the loop (``early``: from inside publish(),
    before the relay waits), or never (None)."""
    session = Session(BrokerSettings(), subscriptions=[], receive_maximum=8, generation=1)
    session.client.timeout = timeout
    on_publish = session._paho.on_publish
    numbers = iter(range(1, 1000))

    def publish(topic: str, payload: bytes, qos: int, retain: bool, properties: object) -> _Sent:
        mid = next(numbers)
        code = verdicts.get(mid)
        if code is not None:
            answer = (lambda: on_publish(session._paho, None, mid, code, None))  # noqa: E731
            if early:
                answer()
            else:
                asyncio.get_running_loop().call_soon(answer)
        return _Sent(mid)

    session._paho.publish = publish
    return session


def test_publish_waits_for_the_pubacks_verdict() -> None:
    async def scenario(early: bool) -> None:
        session = _session_publishing({1: 0, 2: 0x10, 3: 0x87}, early=early)
        await session.publish("out/a", b"x", qos=1)
        await session.publish("out/b", b"x", qos=1)  # 0x10, no matching subscribers: a success
        with pytest.raises(PublishRefused) as refused:
            await session.publish("out/c", b"x", qos=1)
        assert refused.value.code == 0x87 and refused.value.topic == "out/c"
        assert not session._waiting and not session._early

    asyncio.run(scenario(early=False))
    asyncio.run(scenario(early=True))


def test_publish_without_a_puback_fails_after_the_client_timeout() -> None:
    async def scenario() -> None:
        session = _session_publishing({}, timeout=0.05)
        with pytest.raises(aiomqtt.MqttError, match="no PUBACK for 'out/a' within 0.05 s"):
            await session.publish("out/a", b"x", qos=1)
        assert not session._waiting

    asyncio.run(scenario())


def test_a_disconnect_fails_the_publishes_waiting_for_a_puback() -> None:
    async def scenario() -> None:
        session = _session_publishing({})
        waiting = asyncio.ensure_future(session.publish("out/a", b"x", qos=1))
        await asyncio.sleep(0)
        assert session._waiting
        session._fail_waiting("disconnected (test)")
        with pytest.raises(aiomqtt.MqttError, match="publish not confirmed: disconnected"):
            await waiting

    asyncio.run(scenario())

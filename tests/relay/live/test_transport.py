from __future__ import annotations

from hypothesis import given
from hypothesis import strategies as st

from relay.live.transport import AckQueue, Delivery, render_topic, sanitize_level


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
    assert sanitize_level("\ud800") == "?"


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

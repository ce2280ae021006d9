from __future__ import annotations

import base64
import pickle
import time

import orjson
import pytest

from relay.core.errors import InputError
from relay.core.settings import TopicSettings
from relay.live.messages import parse_message, render_cleaned
from relay.live.routing import (
    RenderError,
    dead_letter,
    is_final,
    outgoing,
    partial,
    passthrough,
    render,
)

TOPICS = TopicSettings(output="nlu/{source}/in", prompt="say/{source}/{decision}", dead_letter="dead")


def _utterance(**extra: object):  # type: ignore[no-untyped-def]
    payload = {"id": "u1", "source": "kiosk/1", "nbest": [{"text": "hello there"}], **extra}
    return parse_message(orjson.dumps(payload), topic="asr/k/nbest")


def test_dead_letter_keeps_the_payload_and_says_why() -> None:
    error = InputError("schema", "topic asr/k/nbest: field id: missing")
    v5 = dead_letter("asr/k/nbest", b"\xff raw", error, TOPICS, v5=True)
    assert (v5.topic, v5.payload) == ("dead", b"\xff raw")
    assert v5.properties == {"reason": "schema", "detail": error.detail, "topic": "asr/k/nbest", "size": "5",
                             "truncated": "false"}
    v311 = dead_letter("asr/k/nbest", b"\xff raw", error, TOPICS, v5=False)
    envelope = orjson.loads(v311.payload)
    assert v311.properties is None
    assert envelope["reason"] == "schema" and envelope["topic"] == "asr/k/nbest"
    assert base64.b64decode(envelope["payload_b64"]) == b"\xff raw"


def test_dead_letters_are_capped_and_their_headers_cleaned() -> None:
    error = InputError("oversize", "topic asr/k/nbest: got \x85 and \uffff\ufeff")
    big = dead_letter("asr/k/nbest", b"x" * 5000, error, TOPICS, v5=True, max_bytes=1000)
    assert big.payload == b"x" * 1000
    assert big.properties is not None
    assert (big.properties["size"], big.properties["truncated"]) == ("5000", "true")
    # U+0085 and U+FFFF in a user property make mosquitto drop the connection (malformed UTF-8)
    # and U+FEFF makes paho-mqtt's property reader (readUTF) drop the downstream connection
    assert big.properties["detail"] == "topic asr/k/nbest: got ? and ??"
    envelope = orjson.loads(dead_letter("asr/k/nbest", b"x" * 5000, error, TOPICS, v5=False, max_bytes=10).payload)
    assert base64.b64decode(envelope["payload_b64"]) == b"x" * 10 and envelope["size"] == "5000"


def test_cleaned_goes_to_output_and_prompt_only_when_unsure() -> None:
    utterance = _utterance()
    [out] = outgoing(render(utterance, {"version": "x", "config_hash": "h", "received_at": 0.0},
                            forward_unsure=True), TOPICS)
    assert out.topic == "nlu/kiosk_1/in"  # the '/' in the source cannot add a level
    utterance.decision, utterance.prompt = "confirm", "did you mean hello there?"
    outs = outgoing(render(utterance, {"version": "x", "config_hash": "h", "received_at": 0.0},
                           forward_unsure=True), TOPICS)
    assert [o.topic for o in outs] == ["nlu/kiosk_1/in", "say/kiosk_1/confirm"]
    assert orjson.loads(outs[1].payload)["prompt"] == "did you mean hello there?"
    quiet = TopicSettings(forward_unsure=False)
    assert [o.topic for o in outgoing(render(utterance, {}, forward_unsure=False), quiet)] == [
        "dialogue/kiosk_1/prompt"]


def test_partial_and_passthrough() -> None:
    utterance = _utterance(final="false")
    assert not is_final(utterance)
    assert partial(utterance, b"raw", TOPICS).payload == b"raw"
    flagged = orjson.loads(passthrough(_utterance(), TOPICS, {"received_at": 0.0}, "deadline").payload)
    assert flagged["relay"]["passthrough"] == "deadline" and flagged["text"] == "hello there"


def test_a_result_rendered_where_the_chain_ran_is_the_message_the_relay_would_render() -> None:
    # A worker renders the result and sends bytes back; the relay writes published_at in when it
    # takes them. Text holding a NUL and the same words, as a recogniser could send, stays as sent.
    utterance = _utterance(nbest=[{"text": "\x00published_at 0123456789abcdef hello"}])
    relay = {"version": "x", "config_hash": "h", "received_at": 1.5}
    rendered = pickle.loads(pickle.dumps(render(utterance, relay, forward_unsure=True)))
    before = time.time()
    [out] = outgoing(rendered, TOPICS)
    after = time.time()
    message = orjson.loads(out.payload)
    assert before <= message["relay"]["published_at"] <= after
    expected = render_cleaned(utterance, relay=relay, published_at=message["relay"]["published_at"])
    assert message == orjson.loads(orjson.dumps(expected))
    assert message["text"] == "\x00published_at 0123456789abcdef hello"
    # The relay block is shared with the prompt: the placeholder goes into the cleaned message's
    # copy only, so a prompt rendered from the same block carries no published_at at all.
    utterance.decision, utterance.prompt = "confirm", "did you mean hello?"
    cleaned_out, prompt_out = outgoing(render(utterance, relay, forward_unsure=True), TOPICS)
    assert "published_at" in orjson.loads(cleaned_out.payload)["relay"]
    assert orjson.loads(prompt_out.payload)["relay"] == {"version": "x", "config_hash": "h", "received_at": 1.5}


def test_a_result_that_cannot_be_rendered_says_so() -> None:
    utterance = _utterance()
    utterance.payload = dict(utterance.payload, hook=object())  # no stage should leave such a value
    with pytest.raises(RenderError, match="TypeError"):
        render(utterance, {}, forward_unsure=True)

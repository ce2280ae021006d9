import orjson
import pytest

from relay.core.errors import InputError
from relay.core.fieldmap import FieldMap
from relay.core.utterance import Correction, Entity
from relay.live.messages import CleanedMessage, RecogniserMessage, parse_message, render_cleaned, word_load

GOOD = {
    "id": "kiosk3-000187",
    "source": "kiosk-3",
    "speaker": "staff-017",
    "nbest": [
        {"text": "start the irrigation pumpkin shown three", "conf": 0.41, "logprob": -812.4, "words": [1, 2]},
        {"text": "start the irrigation pump in zone three", "conf": 0.33},
    ],
    "device_clock": 12,
}


def _reason(payload: bytes, **limits: int) -> InputError:
    with pytest.raises(InputError) as caught:
        parse_message(payload, topic="asr/kiosk-3/nbest", **limits)  # type: ignore[arg-type]
    return caught.value


def test_good_message_keeps_unknown_fields() -> None:
    utt = parse_message(orjson.dumps(GOOD), topic="asr/kiosk-3/nbest")
    assert utt.id == "kiosk3-000187" and utt.source == "kiosk-3" and utt.speaker == "staff-017"
    assert utt.payload["device_clock"] == 12
    assert utt.nbest[0].fields["words"] == [1, 2]
    assert [h.rank for h in utt.nbest] == [0, 1]


def test_source_defaults_to_topic() -> None:
    utt = parse_message(b'{"id": "x", "nbest": [{"text": ""}]}', topic="asr/door/nbest")
    assert utt.source == "asr/door/nbest"


@pytest.mark.parametrize(
    ("payload", "reason", "detail"),
    [
        (b"{not json", "invalid_json", "asr/kiosk-3/nbest"),
        (b"\xff\xfe{}", "not_utf8", "byte 0"),
        (b"[1, 2]", "schema", "expected a JSON object"),
        (b'{"nbest": [{"text": "a"}]}', "schema", "field id: Field required"),
        (b'{"id": "", "nbest": [{"text": "a"}]}', "schema", "field id"),
        (b'{"id": "a", "nbest": []}', "schema", "field nbest"),
        (b'{"id": "a", "nbest": [{"text": "a", "conf": 1.5}]}', "schema", "field nbest.0.conf"),
        (b'{"id": "a", "nbest": [{"text": "a", "logprob": 3}]}', "schema", "field nbest.0.logprob"),
        (b'{"id": "a", "nbest": [{"conf": 0.5}]}', "schema", "field nbest.0.text"),
        (b'{"id": "a", "final": "maybe", "nbest": [{"text": "a"}]}', "schema", "field final"),
    ],
)
def test_malformed_messages_name_reason_and_field(payload: bytes, reason: str, detail: str) -> None:
    error = _reason(payload)
    assert error.reason == reason
    assert detail in error.detail


def test_oversize_and_too_many_hypotheses() -> None:
    assert _reason(b'{"id": "a", "nbest": [{"text": "' + b"a" * 400 + b'"}]}', max_payload_bytes=300).reason == "oversize"
    many = orjson.dumps({"id": "a", "nbest": [{"text": str(i)} for i in range(51)]})
    error = _reason(many)
    assert error.reason == "too_many_hypotheses" and "51 items" in error.detail
    assert _reason(orjson.dumps({"id": "a", "nbest": [{"text": "a"}] * 4}), max_hypotheses=3).reason == "too_many_hypotheses"


def test_field_map_adapts_another_shape() -> None:
    foreign = {
        "meta": {"uid": "u-9", "device": "lathe-panel"},
        "result": {"alternatives": [{"transcript": "zone three", "confidence": 0.8}, "shown three"]},
    }
    field_map = FieldMap(id="meta.uid", source="/meta/device", nbest="result.alternatives", text="transcript",
                         conf="confidence")
    utt = parse_message(orjson.dumps(foreign), topic="t", field_map=field_map)
    assert utt.id == "u-9" and utt.source == "lathe-panel"
    assert [h.text for h in utt.nbest] == ["zone three", "shown three"]
    assert utt.nbest[0].fields["conf"] == 0.8
    assert utt.payload["meta"]["uid"] == "u-9"  # the original shape is kept beside


def test_cleaned_message_validates_against_format() -> None:
    utt = parse_message(orjson.dumps(GOOD), topic="asr/kiosk-3/nbest")
    utt.nbest[1].posterior, utt.nbest[0].posterior = 0.7, 0.3
    utt.chosen_text = "start the irrigation pump in zone three"
    utt.entities.append(Entity("zone.3", "place", "zone three", (29, 39), "shown three", 0.9))
    utt.corrections.append(Correction("lexicon", "shown three", "zone three", 0.9, "phonetic"))
    utt.decision, utt.prompt = "accept", "never sent on accept"
    out = render_cleaned(utt, relay={"version": "0", "config_hash": "abc", "received_at": 1.0})
    cleaned = CleanedMessage.model_validate(out)
    assert cleaned.text[slice(*cleaned.entities[0].span)] == "zone three"
    assert [item.text for item in cleaned.nbest] == [GOOD["nbest"][1]["text"], GOOD["nbest"][0]["text"]]
    assert "prompt" not in out and out["device_clock"] == 12
    assert out["nbest"][1]["words"] == [1, 2]
    RecogniserMessage.model_validate(out)  # a cleaned message is still a valid input message


def test_word_load_counts_words_ascii_digits_and_long_words() -> None:
    # each word once; each ASCII digit once more ("20000" is said "twenty thousand"); other
    # scripts' digits (Arabic-Indic three, fullwidth seven) are letters here, as str.count saw them
    assert word_load(["book the saw"], max_word_chars=40) == (3, 3)
    assert word_load(["room 12 at 7.30"], max_word_chars=40) == (9, 9)
    assert word_load(["\u0663 \uff17 x"], max_word_chars=40) == (3, 3)
    assert word_load(["a" * 85 + " b"], max_word_chars=40) == (4, 4)
    assert word_load(["one two", "1 2 3", ""], max_word_chars=40) == (6, 8)
    assert word_load([], max_word_chars=40) == (0, 0)

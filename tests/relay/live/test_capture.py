"""Capture: rotating, size-bounded JSON Lines written off the message path, read back by `label`."""

from __future__ import annotations

import json
from pathlib import Path

from relay.core.settings import CaptureSettings
from relay.live.capture import CaptureWriter, capture_files, encode_record
from relay.live.routing import Outgoing
from relay.workbench.label import Tally, read_pending

MESSAGE = {"id": "m-1", "source": "bench-1", "nbest": [{"text": "book the lathe", "conf": 0.7}]}


def _sent(ident: str) -> list[Outgoing]:
    body = json.dumps({"id": ident, "text": "book the lathe", "decision": "accept"}).encode()
    return [Outgoing(topic="nlu/bench-1/in", payload=body, qos=1, kind="output")]


def test_a_record_holds_the_input_and_what_was_sent_for_it() -> None:
    line = json.loads(encode_record(1_700_000_000.25, "asr/bench-1/nbest", json.dumps(MESSAGE).encode(), "cleaned",
                                    _sent("m-1")))
    assert line == {"at": "2023-11-14T22:13:20.250Z", "topic": "asr/bench-1/nbest", "outcome": "cleaned",
                    "message": MESSAGE, "sent": [{"topic": "nlu/bench-1/in", "kind": "output", "message":
                                                  {"id": "m-1", "text": "book the lathe", "decision": "accept"}}]}
    broken = json.loads(encode_record(0.0, "asr/x/nbest", b"\xffnot json", "dead_letter", []))
    assert broken["payload_text"] == "\ufffdnot json" and "message" not in broken


def test_files_rotate_at_their_size_and_the_oldest_go(tmp_path: Path) -> None:
    settings = CaptureSettings(enabled=True, directory=Path("cap"), max_file_bytes=4096, max_files=3)
    writer = CaptureWriter(settings, tmp_path)
    writer.start()
    payload = json.dumps(MESSAGE).encode()
    for number in range(200):
        writer.record(float(number), "asr/bench-1/nbest", payload, "cleaned", _sent(f"m-{number}"))
    writer.close()
    files = capture_files(tmp_path / "cap")
    assert len(files) == 3
    assert all(path.stat().st_size <= 4096 for path in files)
    assert files[-1].name > files[0].name  # numbered in order; the oldest were removed
    lines = [json.loads(line) for path in files for line in path.read_text().splitlines()]
    ids = [line["sent"][0]["message"]["id"] for line in lines]
    assert ids == [f"m-{n}" for n in range(200 - len(ids), 200)]  # the newest, in order, none lost inside
    assert writer.written == 200 and writer.dropped == 0


def test_a_full_queue_drops_and_counts_instead_of_waiting(tmp_path: Path) -> None:
    dropped: list[int] = []
    settings = CaptureSettings(enabled=True, queue=2)
    writer = CaptureWriter(settings, tmp_path, on_drop=lambda: dropped.append(1))
    for _ in range(5):  # the writer thread is not running: nothing drains the queue
        writer.record(0.0, "t", b"{}", "cleaned", [])
    assert writer.dropped == 3 and len(dropped) == 3


def test_a_new_writer_goes_on_after_the_files_it_finds(tmp_path: Path) -> None:
    settings = CaptureSettings(enabled=True, directory=tmp_path)
    for _ in range(2):
        writer = CaptureWriter(settings, tmp_path)
        writer.start()
        writer.record(0.0, "t", json.dumps(MESSAGE).encode(), "cleaned", [])
        writer.close()
    assert [p.name for p in capture_files(tmp_path)] == ["capture-000001.jsonl", "capture-000002.jsonl"]


def test_label_reads_capture_files_and_passes_over_what_cannot_be_labelled(tmp_path: Path) -> None:
    writer = CaptureWriter(CaptureSettings(enabled=True, directory=Path("cap")), tmp_path)
    writer.start()
    writer.record(0.0, "asr/b/nbest", json.dumps(MESSAGE).encode(), "cleaned", _sent("m-1"))
    writer.record(0.0, "asr/b/nbest", b"{broken", "dead_letter", [])
    partial = dict(MESSAGE, id="m-2", final=False)
    writer.record(0.0, "asr/b/nbest", json.dumps(partial).encode(), "partial", [])
    writer.close()
    plain = tmp_path / "log.jsonl"
    plain.write_text(json.dumps(dict(MESSAGE, id="m-3")) + "\n")
    tally = Tally()
    pending = list(read_pending([tmp_path / "cap", plain], tally=tally))
    assert [(p.id, p.where.rsplit(":", 1)[1]) for p in pending] == [("m-1", "1"), ("m-3", "1")]
    assert tally.unreadable == 2

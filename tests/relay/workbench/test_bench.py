"""`rehear bench`: the shape of what it reports (never its numbers), its data and its broker."""

from __future__ import annotations

import gzip
import json
from pathlib import Path

import orjson
import pytest

from relay.cli import main
from relay.workbench import endtoend
from relay.workbench.benchdata import EXAMPLE, EXAMPLE_FILES, configured, example, read_messages
from tests.paths import WORKSHOP

_PAIR = {"p50", "p99"}


def _shape_checked(result: dict[str, object]) -> None:
    assert {"chain_us", "stage_us", "passthrough_msgs_s", "chain_msgs_s", "throughput_ratio", "added_us",
            "lexicon", "startup_s", "rss_mb"} <= set(result)
    assert set(result["chain_us"]) == _PAIR  # type: ignore[arg-type]
    stages = result["stage_us"]
    assert isinstance(stages, dict) and list(stages) == ["normalize", "lm_rescore", "lexicon", "gate"]
    assert all(set(value) == _PAIR for value in stages.values())
    assert set(result["added_us"]) == _PAIR  # type: ignore[arg-type]
    assert set(result["startup_s"]) == {"cold", "warm"}  # type: ignore[arg-type]
    lexicon = result["lexicon"]
    assert isinstance(lexicon, dict) and set(lexicon) == {"1000", "10000", "100000"}
    assert {"p99_us", "build_s", "rss_mb"} <= set(lexicon["1000"])
    for key in ("passthrough_msgs_s", "chain_msgs_s", "throughput_ratio", "rss_mb"):
        assert isinstance(result[key], float) and result[key] > 0  # type: ignore[operator]


@pytest.mark.broker
@pytest.mark.slow
def test_quick_bench_reports_every_key(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "bench.json"
    assert main(["bench", "--quick", "--json", str(out)]) == 0
    result = json.loads(out.read_text())
    _shape_checked(result)
    assert result["lexicon"]["10000"] is None and result["lexicon"]["100000"] is None  # --quick: 1k only
    assert result["runners"].keys() == {"passthrough", "thread"}
    printed = capsys.readouterr().out
    assert "end to end" in printed and "lexicon stage alone" in printed and "start-up" in printed
    # The machine's speed at the start and the end, as the JSON has it, heads the printed table.
    context = result["context"]
    assert (f"this machine's speed, sum(range(100)): {context['python_loop_us_before']:.2f} us before / "
            f"{context['python_loop_us_after']:.2f} us after") in printed


def test_the_embedded_broker_carries_the_pass_through_relay() -> None:
    payloads = [orjson.dumps({"id": "x", "nbest": [{"text": "hello there"}]})]
    with endtoend.broker(embedded=True) as found:
        assert (found.kind, found.protocol) == ("embedded", "3.1.1")
        run = endtoend.measure_relay(found, ["passthrough"], payloads, messages=40, latency_messages=10,
                                     rate=100.0, event_loop="asyncio")
    assert run.msg_s > 0 and run.forwarded == 0 and run.p99_ms >= run.p50_ms > 0


def test_the_packaged_example_is_the_workshop_example() -> None:
    # rehear bench measures on these copies when rehear is installed without the source tree
    for name in EXAMPLE_FILES:
        assert (EXAMPLE / name).read_bytes() == (WORKSHOP / name).read_bytes(), (
            f"copy examples/workshop/{name} to relay/workbench/example/{name}")
    recorded = [orjson.dumps(orjson.loads(line)["message"])
                for name in ("corpus-whisper.jsonl", "corpus.jsonl")
                for line in (WORKSHOP / name).read_bytes().splitlines() if line.strip()]
    assert read_messages(EXAMPLE / "messages.jsonl.gz") == recorded, (
        "relay/workbench/example/messages.jsonl.gz holds the messages of examples/workshop's "
        "corpus-whisper.jsonl and corpus.jsonl, in that order; write it again from them")


def test_the_example_workload_builds_the_workshop_language_model(tmp_path: Path) -> None:
    workload = example(tmp_path)
    assert (tmp_path / "workshop.arpa").read_bytes() == (WORKSHOP / "workshop.arpa").read_bytes()
    assert workload.config == tmp_path / "relay.yaml" and len(workload.messages) == 900


def test_messages_come_from_a_file_or_from_the_configured_lexicon(tmp_path: Path) -> None:
    corpus_line = {"id": "c1", "reference": "x", "message": {"id": "c1", "nbest": [{"text": "call anna"}]}}
    bare = {"id": "m1", "nbest": [{"text": "hello"}]}
    path = tmp_path / "messages.jsonl.gz"
    path.write_bytes(gzip.compress(b"\n".join(orjson.dumps(r) for r in (corpus_line, bare, {"other": 1}))))
    assert [orjson.loads(m)["id"] for m in read_messages(path)] == ["c1", "m1"]
    generated = configured(WORKSHOP / "relay.yaml", None, count=5)
    assert len(generated.messages) == 5 and "122 lexicon names" in generated.description
    assert all(len(orjson.loads(m)["nbest"]) == 10 for m in generated.messages)
    with pytest.raises(ValueError, match="no recogniser message"):
        configured(WORKSHOP / "relay.yaml", tmp_path / "empty.jsonl" if (tmp_path / "empty.jsonl").write_text("{}")
                   else None)


def test_each_chain_runner_reports_the_latency_it_adds() -> None:
    from types import SimpleNamespace

    from relay.workbench.bench import _end_to_end, format_markdown, format_table

    def run(msg_s: float, p50_ms: float, p99_ms: float) -> SimpleNamespace:
        return SimpleNamespace(msg_s=msg_s, cpu_us=100.0, p50_ms=p50_ms, p99_ms=p99_ms, forwarded=0, pss_mb=40.0)

    runs = {"passthrough": [run(5000, 0.5, 1.0), run(5200, 0.7, 1.2)],
            "process": [run(1400, 1.5, 2.5)], "thread": [run(900, 1.6, 3.0)]}
    result = _end_to_end(runs, ["process", "thread"], SimpleNamespace(kind="mosquitto", protocol="5"))
    # The pass-through's medians are 0.6 and 1.1 ms, so each runner adds its own difference.
    assert result["runners"]["process"]["added_us"] == {"p50": 900.0, "p99": 1400.0}
    assert result["runners"]["thread"]["added_us"] == {"p50": 1000.0, "p99": 1900.0}
    assert result["added_us"] == result["runners"]["process"]["added_us"]  # the first runner named
    assert "added_us" not in result["runners"]["passthrough"]
    result |= {"context": {"date": "d", "cpus": 2, "load_before": [0.0], "load_after": [0.0], "workload": "w",
                           "rate": 200.0, "python_loop_us_before": 0.48, "python_loop_us_after": 0.61},
               "chain_us": {"p50": 1.0, "p99": 2.0}, "stage_us": {}, "lexicon": {},
               "startup_s": {"cold": 1.0, "warm": 1.0}, "rss_mb": 1.0, "peak_rss_mb": 1.0}
    printed = format_table(result)
    assert "this machine's speed, sum(range(100)): 0.48 us before / 0.61 us after" in printed
    assert "runner thread: p50 +1,000 us, p99 +1,900 us" in printed
    assert "runner process: p50 +900 us, p99 +1,400 us" in printed
    assert "| latency the chain adds at 200 msg/s, `chain_runner: thread` | p50 +1.00 ms, p99 +1.90 ms |" \
        in format_markdown(result)


def test_the_speed_yardstick_is_the_best_of_its_timings_per_loop(monkeypatch: pytest.MonkeyPatch) -> None:
    from relay.workbench import bench

    calls = []

    def timings(statement: str, *, number: int, repeat: int) -> list[float]:
        calls.append((statement, number, repeat))
        return [0.0124, 0.0096, 0.0110, 0.0200, 0.0100][:repeat]  # seconds for `number` loops

    monkeypatch.setattr(bench.timeit, "repeat", timings)
    # The best of five runs of 20,000 loops: 0.0096 s / 20,000 = 0.48 us a loop.
    assert bench.python_loop_us() == 0.48
    assert calls == [("sum(range(100))", 20_000, 5)]

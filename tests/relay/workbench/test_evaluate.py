from __future__ import annotations

import dataclasses
import importlib.util
import json
import os
from pathlib import Path
from typing import Any

import jiwer
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from relay.cli import eval as eval_command
from relay.core.chain import Chain
from relay.core.errors import ConfigError, InputError
from relay.core.fieldmap import FieldMap
from relay.core.registry import Registry
from relay.workbench.corpus import parse_filter, read_corpus
from relay.workbench.defaults import default_config
from relay.workbench.evaluate import Outcome, edit_distance, summarize, word_errors
from stages.gate.stage import GateStage
from stages.normalize.stage import NormalizeStage
from stages.normalize.tokens import tokenize
from tests.paths import TESTS
from tests.relay.workbench.corpus_fixtures import write_config, write_corpus

TINY = TESTS / "relay" / "workbench" / "data" / "tiny.jsonl"

PAIRS = [
    ("start the irrigation pump in zone three", "start the irrigation pumpkin shown three"),
    ("book the lathe for Ane at 3", "book the lathe for anne at three"),
    ("lock the mezzanine", "block the mezzanine"),
    ("thanh okonkwo is on the ember reflow oven", "tom know com quoted shown the emperor flow of the"),
    ("a b c d", "d c b a"),
    ("one", ""),
    ("hello world", "hello world"),
]


def _normalised(text: str) -> str:
    return " ".join(tokenize(text))


# Reference library: jiwer (pip package `jiwer`), word error rate on the same normalised pairs.
@pytest.mark.parametrize("reference,hypothesis", PAIRS)
def test_wer_matches_jiwer_per_pair(reference: str, hypothesis: str) -> None:
    edits, words = word_errors(reference, hypothesis)
    assert edits / words == pytest.approx(jiwer.wer(_normalised(reference), _normalised(hypothesis)))


def test_corpus_wer_matches_jiwer_over_all_pairs() -> None:
    # jiwer pools edits over all pairs and divides by all reference words, as summarize does.
    totals = [word_errors(r, h) for r, h in PAIRS]
    ours = sum(e for e, _ in totals) / sum(w for _, w in totals)
    assert ours == pytest.approx(jiwer.wer([_normalised(r) for r, _ in PAIRS], [_normalised(h) for _, h in PAIRS]))


words = st.lists(st.sampled_from(["a", "b", "c", "dd", "e"]), max_size=12)


@settings(max_examples=200, deadline=None)
@given(reference=words.filter(bool), hypothesis=words)
def test_edit_distance_matches_jiwer_on_random_word_lists(reference: list[str], hypothesis: list[str]) -> None:
    # Reference library: jiwer.process_words counts substitutions, deletions and insertions.
    measured = jiwer.process_words(" ".join(reference), " ".join(hypothesis))
    assert edit_distance(reference, hypothesis) == measured.substitutions + measured.deletions + measured.insertions


def _outcome(ref_ids: set[str], found: set[str], decision: str | None, errors: int = 0) -> Outcome:
    return Outcome(id="x", tags={}, ref_words=4, errors_first=2, errors_oracle=1, errors_relay=errors,
                   reference_ids=frozenset(ref_ids), found={i: "machine" for i in found}, decision=decision,  # type: ignore[arg-type]
                   gate=None, stage_us={"normalize": 10.0, "gate": 5.0}, total_us=15.0)


def test_summary_counts_entities_decisions_and_wrong_accepts() -> None:
    outcomes = [
        _outcome({"a"}, {"a"}, "accept"),
        _outcome({"a", "b"}, {"a"}, "accept", errors=1),  # wrong accept: b missing
        _outcome({"c"}, {"c", "d"}, "confirm"),
        _outcome(set(), set(), "reprompt"),
    ]
    summary = summarize(outcomes)
    assert summary.entity_recall == pytest.approx(3 / 4)
    assert summary.entity_precision == pytest.approx(3 / 4)
    assert summary.decisions == {"accept": 0.5, "confirm": 0.25, "reprompt": 0.25}
    assert summary.wrong_accept_rate == pytest.approx(0.5)
    assert summary.accepted_with_word_error == pytest.approx(0.5)
    assert summary.wer_first == pytest.approx(0.5)
    assert summary.wer_relay == pytest.approx(1 / 16)
    assert summary.stage_latency_us["gate"]["p99"] == 5.0


def _typed(ref_ids: set[str], found: set[str]) -> Outcome:
    return dataclasses.replace(_outcome(ref_ids, set(), "accept"), found={i: i.partition(".")[0] for i in found})


def test_slot_errors_count_as_the_slot_error_rate_does() -> None:
    # Makhoul, Kubala, Schwartz and Weischedel (1999), "Performance measures for information
    # extraction": SER = (substitutions + deletions + insertions) / reference slots; a wrong
    # filler of a slot is one substitution, not a deletion and an insertion.
    assert _typed({"person.ana", "place.loft"}, {"person.ana", "place.loft"}).slot_errors == 0
    assert _typed({"person.ana"}, {"person.bo"}).slot_errors == 1  # S
    assert _typed({"person.ana", "place.loft"}, set()).slot_errors == 2  # D + D
    assert _typed(set(), {"machine.saw"}).slot_errors == 1  # I
    # S (person) + D (place) + I (machine): 3 errors, not the 4 a set difference would count.
    assert _typed({"person.ana", "place.loft"}, {"person.bo", "machine.saw"}).slot_errors == 3


def test_eval_json_has_exactly_the_documented_keys(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    corpus = write_corpus(tmp_path / "corpus.jsonl", 40)
    out = tmp_path / "out.json"
    code = eval_command.main([str(corpus), "--config", str(write_config(tmp_path / "relay.yaml")),
                              "--json", str(out), "--no-progress"])
    assert code == 0
    data = json.loads(out.read_text())
    assert set(data) == {"utterances", "wer_first", "wer_oracle", "wer_relay", "entity_recall",
                         "entity_precision", "decisions", "wrong_accept_rate", "accepted", "wrong_accepts",
                         "asked_policy", "asked_doubt", "confidence_quality", "latency_us"}
    assert data["asked_policy"] + data["asked_doubt"] == pytest.approx(
        data["decisions"]["confirm"] + data["decisions"]["reprompt"])
    assert set(data["decisions"]) == {"accept", "confirm", "reprompt"}
    assert set(data["latency_us"]) == {"p50", "p99"}
    assert data["utterances"] == 40
    assert sum(data["decisions"].values()) == pytest.approx(1.0)
    assert data["wer_oracle"] <= data["wer_first"]
    assert "WER, rehear" in capsys.readouterr().out


def test_eval_filters_by_tag(tmp_path: Path) -> None:
    corpus = write_corpus(tmp_path / "corpus.jsonl", 60)
    items = read_corpus(corpus)
    quiet = sum(item.tags["snr_db"] != 15 for item in items)
    out = tmp_path / "out.json"
    config = str(write_config(tmp_path / "relay.yaml"))
    for option in (["--where", "snr_db!=15"], ["--exclude-tag", "snr_db=15"]):
        eval_command.main([str(corpus), "--config", config, "--json", str(out), "--no-progress", *option])
        assert json.loads(out.read_text())["utterances"] == quiet


def test_filters_compare_values_as_text_and_null_matches_missing() -> None:
    items = read_corpus(TINY)
    keep = parse_filter("snr_db=null,25")
    assert [item.id for item in items if keep(item)] == ["a", "b"]
    assert [item.id for item in items if parse_filter("snr_db!=null")(item)] == ["b", "c"]
    with pytest.raises(ValueError, match="TAG=VALUE"):
        parse_filter("snr_db<15")


@pytest.mark.parametrize("line,message", [
    ("{not json", "not valid JSON"),
    ('{"id": "z", "entities": [], "message": {"id": "z", "nbest": [{"text": "a"}]}}', "field reference: Field required"),
    ('{"id": "z", "reference": "a", "message": {"id": "z", "nbest": []}}', "message: field nbest"),
    ('{"id": "a", "reference": "a", "message": {"id": "a", "nbest": [{"text": "a"}]}}', "id 'a' already used at"),
    ("[1, 2]", "expected a JSON object"),
])
def test_invalid_corpus_line_names_file_and_line(tmp_path: Path, line: str, message: str) -> None:
    corpus = tmp_path / "bad.jsonl"
    good = TINY.read_text().splitlines()
    corpus.write_text("\n".join(good[:2] + [line]) + "\n")
    with pytest.raises(InputError, match=message) as caught:
        read_corpus(corpus)
    assert f"{corpus}:3:" in str(caught.value)


def test_eval_command_reports_a_bad_line_without_a_traceback(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    corpus = tmp_path / "bad.jsonl"
    corpus.write_text('{"id": "a", "reference": "x", "message": {"id": "a", "nbest": [{"text": "x", "conf": 2}]}}\n')
    code = eval_command.main([str(corpus), "--config", str(write_config(tmp_path / "relay.yaml")), "--no-progress"])
    assert code != 0
    assert f"{corpus}:1: message: field nbest.0.conf" in capsys.readouterr().err


def test_report_embeds_the_plots_as_png(tmp_path: Path) -> None:
    if importlib.util.find_spec("matplotlib") is None:
        # CI installs the report extra: there a missing matplotlib is a failure, not a skip.
        if os.environ.get("CI", "").lower() == "true":
            pytest.fail("matplotlib is not installed (pip install -e '.[test,report]')", pytrace=False)
        pytest.skip("matplotlib is not installed")
    corpus = write_corpus(tmp_path / "corpus.jsonl", 60)
    report = tmp_path / "report.html"
    assert eval_command.main([str(corpus), "--config", str(write_config(tmp_path / "relay.yaml")),
                              "--report", str(report), "--no-progress"]) == 0
    page = report.read_text()
    assert page.count("src='data:image/png;base64,") >= 3
    assert "Wrong accepts against clarifications" in page and "Entity recall per type" in page


def test_eval_builds_and_loads_the_chain_once(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # The corpus check (entity ids against the chain's lexicon), the run and the outputs all use
    # one chain.
    built: list[Chain] = []
    loads: list[Chain] = []
    real_init, real_load = Chain.__init__, Chain.load

    def counted_init(chain: Chain, *args: Any, **kwargs: Any) -> None:
        built.append(chain)
        real_init(chain, *args, **kwargs)

    def counted_load(chain: Chain) -> None:
        loads.append(chain)
        real_load(chain)

    monkeypatch.setattr(Chain, "__init__", counted_init)
    monkeypatch.setattr(Chain, "load", counted_load)
    corpus = write_corpus(tmp_path / "corpus.jsonl", 30)
    extra = ["--report", str(tmp_path / "r.html")] if importlib.util.find_spec("matplotlib") is not None else []
    assert eval_command.main([str(corpus), "--config", str(write_config(tmp_path / "relay.yaml")),
                              "--json", str(tmp_path / "s.json"), "--results", str(tmp_path / "r.jsonl"),
                              "--no-progress", *extra]) == 0
    assert len(built) == 1 and loads == built


def test_default_chain_leaves_out_stages_that_are_not_installed(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    registry = Registry(builtins=False, plugins=False)
    registry.register(NormalizeStage)  # type: ignore[arg-type]
    registry.register(GateStage)  # type: ignore[arg-type]
    lexicon = tmp_path / "lexicon.csv"
    lexicon.write_text("id,type,name\nmachine.lathe,machine,lathe\n")
    raw = default_config(lexicon=lexicon, train=None, speakers=None, cache_dir=tmp_path / "cache", registry=registry)
    assert raw["stages"] == ["normalize", "gate"]
    assert "lexicon is not installed" in capsys.readouterr().err
    with pytest.raises(ConfigError, match="does not exist"):
        default_config(lexicon=tmp_path / "missing.csv", train=None, speakers=None, registry=registry)


def test_corpus_messages_go_through_the_relays_field_map(tmp_path: Path) -> None:
    corpus = tmp_path / "own-shape.jsonl"
    corpus.write_text('{"id": "a", "reference": "book the lathe", "message": '
                      '{"utt": "a", "result": {"alts": [{"transcript": "book the lathe"}]}}}\n')
    with pytest.raises(InputError, match=f"{corpus}:1: message"):
        read_corpus(corpus)
    field_map = FieldMap(id="utt", nbest="result.alts", text="transcript")
    [item] = read_corpus(corpus, field_map=field_map)
    assert item.utterance().nbest[0].text == "book the lathe"


def test_confidence_quality_on_a_worked_example() -> None:
    # Worked by hand from the definition in NIST's SCTK scoring tools (sclite, "normalized cross
    # entropy"): four results, three right, confidences 0.9, 0.8, 0.7 (right) and 0.2 (wrong).
    # H_max = -(3 log2 0.75 + log2 0.25) = 3.2451; H = -(log2 0.9 + log2 0.8 + log2 0.7 + log2 0.8)
    # = 0.1520 + 0.3219 + 0.5146 + 0.3219 = 1.3104; NCE = (3.2451 - 1.3104) / 3.2451 = 0.5962.
    from relay.workbench.evaluate import confidence_quality

    quality = confidence_quality([0.9, 0.8, 0.7, 0.2], [True, True, True, False])
    assert quality["nce"] == pytest.approx(0.5962, abs=1e-3)
    assert quality["brier"] == pytest.approx((0.01 + 0.04 + 0.09 + 0.04) / 4)
    # ECE by hand: bins [0.2,0.3) 0.2 vs 0 right; [0.7,0.8) 0.7 vs 1; [0.8,0.9) 0.8 vs 1; [0.9,1] 0.9 vs 1.
    assert quality["ece"] == pytest.approx((0.2 + 0.3 + 0.2 + 0.1) / 4)
    assert confidence_quality([0.75] * 4, [True, True, True, False])["nce"] == pytest.approx(0.0, abs=1e-9)

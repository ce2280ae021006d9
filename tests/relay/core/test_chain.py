import math
import time
from pathlib import Path

import numpy as np
import pytest

from relay.core.chain import Chain
from relay.core.errors import ConfigError, DeadlineExceeded, StageError
from relay.core.stage import StageContext, check_order
from relay.core.utterance import TraceEntry, softmax
from relay.live.messages import parse_message
from stages.normalize.stage import NormalizeSettings, NormalizeStage


def test_softmax_is_stable_and_normalised() -> None:
    probabilities = softmax([-1000.0, -1001.0])
    assert sum(probabilities) == pytest.approx(1.0)
    assert probabilities[0] / probabilities[1] == pytest.approx(math.e)
    assert softmax([-math.inf, -math.inf]) == [0.5, 0.5]
    assert softmax([]) == []


class _Needy(NormalizeStage):
    name = "needy"
    needs = frozenset({"lm_score"})


def test_order_check_names_the_missing_capability() -> None:
    stage = _Needy(NormalizeSettings(), context=StageContext(Path("."), Path(".")))
    with pytest.raises(ConfigError, match=r"stages\[0\] \(needy\): needs lm_score"):
        check_order([stage])


class _Slow(NormalizeStage):
    name = "slow"

    def process(self, utterance):  # type: ignore[no-untyped-def]
        time.sleep(0.02)  # the overrun under test: four times the 5 ms deadline, whatever the machine
        return utterance


def test_deadline_is_checked_between_stages() -> None:
    context = StageContext(Path("."), Path("."))
    chain = Chain([_Slow(NormalizeSettings(), context=context), NormalizeStage(NormalizeSettings(), context=context)])
    utt = parse_message(b'{"id": "a", "nbest": [{"text": "x"}]}', topic="t")
    with pytest.raises(DeadlineExceeded, match="before stage normalize"):
        chain.process(utt, deadline=time.monotonic() + 0.005)


def test_trace_has_one_timed_entry_per_stage() -> None:
    context = StageContext(Path("."), Path("."))
    chain = Chain([NormalizeStage(NormalizeSettings(), context=context)])
    utt = chain.process(parse_message(b'{"id": "a", "nbest": [{"text": "x"}]}', topic="t"))
    assert [entry.stage for entry in utt.trace] == ["normalize"]
    assert utt.trace[0].elapsed_us > 0


class _Looping(NormalizeStage):
    """Works in a loop that asks for the deadline, as a stage whose cost grows with the message does."""

    name = "looping"
    rounds = 0

    def process(self, utterance):  # type: ignore[no-untyped-def]
        while True:
            utterance.check_deadline()
            type(self).rounds += 1
            time.sleep(0.001)  # one round of work; the loop is stopped only by check_deadline


def test_a_stage_that_checks_is_stopped_inside_when_the_deadline_passes() -> None:
    context = StageContext(Path("."), Path("."))
    chain = Chain([NormalizeStage(NormalizeSettings(), context=context), _Looping(NormalizeSettings(), context=context)])
    utt = parse_message(b'{"id": "a", "nbest": [{"text": "x"}]}', topic="t")
    began = time.monotonic()
    with pytest.raises(DeadlineExceeded, match="inside stage looping"):
        chain.process(utt, deadline=time.monotonic() + 0.02)
    assert _Looping.rounds >= 1 and time.monotonic() - began < 5  # stopped, not run forever


def test_normalize_lm_rescore_and_gate_stop_inside_once_late() -> None:
    from stages.lm.rescore import LmRescoreSettings, LmRescoreStage
    from tests.paths import ROOT

    context = StageContext(ROOT / "tests/data", ROOT / "tests/data")
    from stages.gate.settings import GateSettings
    from stages.gate.stage import GateStage

    lm = LmRescoreStage(LmRescoreSettings(model=Path("lm_domain.o3.arpa")), context=context)
    lm.load()
    gate = GateStage(GateSettings(), context=context)
    gate.load()
    for stage in (NormalizeStage(NormalizeSettings(), context=context), lm, gate):
        utt = Chain([NormalizeStage(NormalizeSettings(), context=context)]).process(parse_message(
            b'{"id": "a", "nbest": [{"text": "one"}, {"text": "two"}]}', topic="t"))
        utt.deadline = time.monotonic() - 1  # already late: the first hypothesis is not even started
        utt.trace.append(TraceEntry(stage.name))
        with pytest.raises(DeadlineExceeded, match=f"inside stage {stage.name}"):
            stage.process(utt)


def test_a_trace_value_json_cannot_carry_is_refused_where_it_is_written() -> None:
    utt = parse_message(b'{"id": "a", "nbest": [{"text": "x"}]}', topic="t")
    utt.trace.append(TraceEntry("writer"))
    utt.note(fine=[1, 2.5, "x", {"k": None}], array=np.arange(3), number=np.float32(0.5))
    with pytest.raises(StageError, match=r"stage writer: trace value 'seen' cannot be serialised \(set"):
        utt.note(ok=1, seen={"a"})
    assert "ok" not in utt.trace[-1].scores  # nothing of a refused note is kept


class _SharesTheLanguageModel(NormalizeStage):
    """Loads the language model through the helper lm_rescore wrote, as the lexicon stage does."""

    name = "lm_user"

    def load(self) -> None:
        from stages.lm.model import shared_model

        shared_model(Path("/nonexistent/domain.arpa"))


def test_a_file_a_stage_cannot_load_is_reported_as_that_stages_problem() -> None:
    chain = Chain([_SharesTheLanguageModel(NormalizeSettings(), context=StageContext(Path("."), Path(".")))])
    with pytest.raises(StageError) as caught:
        chain.load()
    assert caught.value.stage == "lm_user"
    assert str(caught.value) == "stage lm_user: model file /nonexistent/domain.arpa not found"

import math
import time
from pathlib import Path

import pytest

from relay.core.chain import Chain
from relay.core.errors import ConfigError, DeadlineExceeded
from relay.core.stage import StageContext, check_order
from relay.core.utterance import softmax
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

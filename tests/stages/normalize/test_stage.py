import math
from pathlib import Path

import pytest

from relay.core.chain import Chain
from relay.core.stage import StageContext
from relay.live.messages import parse_message
from stages.normalize.stage import NormalizeSettings, NormalizeStage

CONTEXT = StageContext(base_dir=Path("."), cache_dir=Path(".rehear-cache"))


def _run(payload: str, **settings: object) -> object:
    stage = NormalizeStage(NormalizeSettings.model_validate(settings), context=CONTEXT)
    stage.load()
    return Chain([stage]).process(parse_message(payload.encode(), topic="asr/t/nbest"))


def test_logprob_becomes_softmax_posterior() -> None:
    utt = _run('{"id": "a", "nbest": [{"text": "one", "logprob": -10.0}, {"text": "two", "logprob": -11.0}]}',
               logprob_scale=1.0)
    first, second = utt.nbest
    # softmax of (-10, -11): 1 / (1 + e^-1)
    assert first.posterior == pytest.approx(1 / (1 + math.exp(-1)))
    assert first.posterior + second.posterior == pytest.approx(1.0)
    assert utt.trace[0].scores["score_source"] == "logprob"


def test_logprob_scale_flattens() -> None:
    utt = _run('{"id": "a", "nbest": [{"text": "one", "logprob": -10.0}, {"text": "two", "logprob": -30.0}]}',
               logprob_scale=0.05)
    assert utt.nbest[0].posterior == pytest.approx(1 / (1 + math.exp(-1)))


def test_duplicates_merge_by_summing_probability() -> None:
    utt = _run(
        '{"id": "a", "nbest": [{"text": "Zone 3", "conf": 0.3}, {"text": "shown three", "conf": 0.4},'
        ' {"text": "zone three.", "conf": 0.3}]}'
    )
    assert [h.text for h in utt.nbest] == ["zone three", "shown three"]
    merged = utt.nbest[0]
    assert merged.merged == 2 and merged.rank == 0
    assert merged.posterior == pytest.approx(0.6)
    assert utt.best.text == "zone three"


def test_conf_zero_stays_possible() -> None:
    utt = _run('{"id": "a", "nbest": [{"text": "a", "conf": 1.0}, {"text": "b", "conf": 0.0}]}')
    assert 0 < utt.nbest[1].posterior < 1e-5


def test_rank_prior_when_no_scores() -> None:
    utt = _run('{"id": "a", "nbest": [{"text": "a"}, {"text": "b"}, {"text": "c", "conf": 0.9}]}', rank_decay=1.0)
    posteriors = [h.posterior for h in utt.nbest]
    assert posteriors == sorted(posteriors, reverse=True)
    assert posteriors[0] / posteriors[1] == pytest.approx(math.e)
    assert utt.trace[0].scores["score_source"] == "rank"


def test_empty_hypothesis_is_kept() -> None:
    utt = _run('{"id": "a", "nbest": [{"text": ""}, {"text": "hello"}]}')
    assert utt.nbest[0].tokens == [] and utt.nbest[0].text == ""
    assert sum(h.posterior for h in utt.nbest) == pytest.approx(1.0)

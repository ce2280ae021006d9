import copy
import pickle
from dataclasses import dataclass

import numpy as np

from relay.core.utterance import Correction, Entity, Hypothesis, TraceEntry, Utterance


def _utterance() -> Utterance:
    fields = [{"text": "book the band saw", "conf": 0.6, "words": [1, 2]}, {"text": "book the bend saw"}]
    payload = {"id": "m-1", "nbest": fields, "extra": {"kept": True}}
    nbest = [Hypothesis("book the band saw", 0, fields[0], ["book", "the", "band", "saw"], 0.75, {"lm": -3.5},
                        merged=2, readings=[["book"]]),
             Hypothesis("book the bend saw", 1, fields[1], ["book", "the", "bend", "saw"], 0.25)]
    return Utterance(
        "m-1", "kiosk-1", None, payload, nbest,
        entities=[Entity("machine.band_saw", "machine", "band saw", (9, 17), "band saw", 0.9, support=0.8)],
        corrections=[Correction("lexicon", "bend saw", "band saw", 0.8, "sound")],
        trace=[TraceEntry("normalize", 12.5, {"hypotheses": 2}), TraceEntry("gate", 3.0, {"w": np.float64(0.5)})],
        decision="confirm", prompt="Did you mean the band saw?", chosen_text="book the band saw", deadline=12.5,
    )


def test_an_utterance_comes_back_from_pickle_and_copy_with_every_field() -> None:
    utterance = _utterance()
    for again in (pickle.loads(pickle.dumps(utterance, protocol=pickle.HIGHEST_PROTOCOL)),
                  pickle.loads(pickle.dumps(utterance, protocol=2)), copy.deepcopy(utterance)):
        assert again == utterance and again is not utterance
        assert type(again.nbest[0]) is Hypothesis and type(again.entities[0].span) is tuple
        # the recogniser's fields stay the very dicts of the payload, as in the relay
        assert again.nbest[0].fields is again.payload["nbest"][0]
    shallow = copy.copy(utterance)
    assert shallow == utterance and shallow.nbest is utterance.nbest


@dataclass(slots=True)
class _MoreHypothesis(Hypothesis):
    extra: str = "x"


def test_a_subclass_with_fields_of_its_own_pickles_them_too() -> None:
    hypothesis = _MoreHypothesis("a", 0, {}, extra="kept")
    again = pickle.loads(pickle.dumps(hypothesis, protocol=pickle.HIGHEST_PROTOCOL))
    assert type(again) is _MoreHypothesis and again == hypothesis and again.extra == "kept"

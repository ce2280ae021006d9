"""Everything the lexicon stage decides, held to the recorded digests (tests/stages/lexicon/digests.py).

A difference means the stage decided something else somewhere in a run: an entity, a score
in its last bit, a correction, a gate decision, a trace entry. When a change is meant to
alter results, record again from the repository root and commit the new
lexicon_outputs.json with the change: ``python -m tests.stages.lexicon.digests --record``.

The digests hold every float to the last bit, so they belong to the environment they were
recorded in: other numpy, rapidfuzz or kenlm versions can move the last digit of a score and
change a digest with no change in this repository. After such an upgrade, look at what moved
before recording again. The compiled kernels and their numpy fallback give the same digests
(tests/stages/lexicon/sound/test_kernels.py holds them to the same bits).
"""

from __future__ import annotations

import math

import pytest

from relay.core.utterance import Entity, Hypothesis, Utterance
from tests.stages.lexicon.digests import RECORDED, RUNS, describe, digest, recorded


def test_every_run_has_a_recorded_digest_and_every_recorded_digest_a_run() -> None:
    assert set(recorded()) == set(RUNS)


@pytest.mark.slow
@pytest.mark.parametrize("run", list(RUNS))
def test_lexicon_outputs_match_the_recorded_digest(run: str) -> None:
    expected_digest, expected_rows = recorded()[run]
    found_digest, found_rows = digest(RUNS[run]())
    assert (found_digest, found_rows) == (expected_digest, expected_rows), (
        f"the lexicon stage's outputs on the {run!r} run differ from {RECORDED.name}: "
        f"{found_rows} messages, digest {found_digest[:16]}; recorded {expected_rows} messages, "
        f"digest {expected_digest[:16]}. If the change was meant to alter results, record again "
        "with `python -m tests.stages.lexicon.digests --record`."
    )


def test_a_score_one_bit_apart_changes_the_digest() -> None:
    # The digest must see the smallest change the test above is meant to catch.
    def row(score: float) -> dict[str, object]:
        utterance = Utterance("u", "bench", None, {}, [Hypothesis("ada", 0, {})])
        utterance.entities.append(Entity("e1", "person", "Ada", (0, 1), "ada", score))
        return describe(utterance)

    score = 0.7321
    assert digest([row(score)]) != digest([row(math.nextafter(score, 1.0))])

from __future__ import annotations

import math

from hypothesis import given, settings
from hypothesis import strategies as st

from stages.indomain.line_stats import entity_free_share, unseen_share


def test_entity_free_share_is_the_rule_of_succession_over_lines_without_markers() -> None:
    lines = [["open", "the", "door"], ["start", "the", "{machine}"], ["tell", "{person}", "to", "stop"]]
    # Laplace's rule of succession: (k + 1) / (n + 2), with k = 1 line of n = 3 naming nothing.
    assert entity_free_share(lines) == (1 + 1) / (3 + 2)
    # Never 0 or 1, so its log-odds stay finite however few lines there are.
    assert entity_free_share([["start", "{machine}"]]) == 1 / 3
    assert entity_free_share([["open", "the", "door"]]) == 2 / 3
    assert entity_free_share([]) is None
    assert entity_free_share([[]]) is None


def test_unseen_share_on_a_worked_example() -> None:
    # Good (1953): the probability that the next token is a word not yet seen is N1 / N, the share
    # of tokens whose word was seen once. "the" twice, "door" and "gate" once, markers left out.
    assert unseen_share([["open", "the", "door"], ["shut", "the", "gate", "{place}"]]) == 4 / 6
    assert unseen_share([["{machine}"]]) is None


words = st.lists(st.lists(st.sampled_from(["a", "b", "c", "d", "e", "f", "{x}"]), max_size=6), max_size=8)


@settings(max_examples=200, deadline=None)
@given(lines=words)
def test_unseen_share_equals_the_leave_one_out_rate_of_new_words(lines: list[list[str]]) -> None:
    # The Good-Turing estimate of the unseen mass is the leave-one-out estimate: take each token
    # out in turn and ask whether the rest holds its word. Counted here by brute force.
    tokens = [t for line in lines for t in line if not t.startswith("{")]
    if not tokens:
        assert unseen_share(lines) is None
        return
    new = sum(1 for i, t in enumerate(tokens) if t not in tokens[:i] + tokens[i + 1:])
    share = unseen_share(lines)
    assert share is not None and math.isclose(share, new / len(tokens))

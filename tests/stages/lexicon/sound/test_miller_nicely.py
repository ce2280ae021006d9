"""The hand phone costs against a published consonant confusion table.

Source: G. A. Miller and P. E. Nicely (1955), "An analysis of perceptual confusions among some
English consonants", JASA 27(2), 338-352: sixteen consonants heard in noise. The numbers are the
six flat-noise conditions pooled into symmetric confusion probabilities, as Arabie and Carroll
distribute them (tests/data/miller_nicely_1955.csv says where they were read). The paper's
finding, in its abstract: voicing and nasality survive noise, place of articulation is the
feature most often lost.

The table can show an ordering of pairs, not a cost scale, so the checks compare ranks and
class means. Pairs are classed by the project's own feature table (phonetics.contrast).
"""

from __future__ import annotations

import csv

import numpy as np
import pytest

from stages.lexicon.sound.phonetics import CostModel, contrast
from tests.paths import DATA

TABLE = DATA / "miller_nicely_1955.csv"
HAND = CostModel.features()


def confusions() -> dict[frozenset[str], float]:
    with TABLE.open(encoding="utf-8") as handle:
        rows = list(csv.reader(line for line in handle if not line.startswith("#")))
    phones = rows[0][1:]
    found = {}
    for row in rows[1:]:
        for column, value in enumerate(row[1:]):
            found[frozenset((row[0], phones[column]))] = float(value)
    return found


def ranks(values: list[float]) -> np.ndarray:
    array = np.asarray(values)
    order = np.argsort(array, kind="stable")
    out = np.empty(len(array))
    out[order] = np.arange(len(array))
    for value in np.unique(array):
        out[array == value] = out[array == value].mean()  # ties share their mean rank
    return out


def kind(pair: frozenset[str]) -> str:
    return contrast(*sorted(pair))


def symmetric(model: CostModel, pair: frozenset[str]) -> float:
    a, b = sorted(pair)
    return (model.cost(a, b) + model.cost(b, a)) / 2.0


def test_the_table_reads_as_the_paper_reports() -> None:
    # Guards the transcription: 120 pairs of the 16 consonants, and the paper's own summary holds
    # in it - pairs that keep voicing and nasality are confused far more often than pairs that
    # change either, and every voicing-only pair (p/b, s/z, ...) less often than the place pairs
    # confused most (p/k, f/th, d/g, v/dh).
    table = confusions()
    assert len(table) == 120 and all(0 < v < 1 for v in table.values())
    by_kind: dict[str, list[float]] = {}
    for pair, value in table.items():
        by_kind.setdefault(kind(pair), []).append(value)
    keep = by_kind["place only"] + by_kind["place and manner"]
    assert np.mean(keep) > 3 * np.mean(by_kind["voicing"] + by_kind["voicing only"])
    assert np.mean(keep) > 3 * np.mean(by_kind["nasality"])
    assert max(by_kind["voicing only"]) < min(table[frozenset(p)] for p in (("P", "K"), ("F", "TH"), ("D", "G"),
                                                                            ("V", "DH")))


def test_hand_costs_rank_consonant_pairs_as_the_table_does() -> None:
    # Spearman's rho between cost and confusion over all 120 pairs: negative means the pairs
    # heard alike cost less. The hand costs reach -0.37 (measured 2026-12); -0.3 is the floor a
    # change to them should not cross without a reason.
    table = confusions()
    pairs = sorted(table, key=sorted)
    rho = np.corrcoef(ranks([symmetric(HAND, p) for p in pairs]), ranks([table[p] for p in pairs]))[0, 1]
    assert rho <= -0.3


def test_keeping_voicing_and_nasality_costs_least_as_in_the_table() -> None:
    # The class means follow the table's order: pairs changing only place or manner cost least,
    # then pairs changing voicing, then pairs changing nasality (the table: most confused first).
    table = confusions()
    classes = {"same voicing and nasality": ("place only", "place and manner"), "voicing": ("voicing", "voicing only"),
               "nasality": ("nasality",)}
    cost = {name: np.mean([symmetric(HAND, p) for p in table if kind(p) in kinds]) for name, kinds in classes.items()}
    heard = {name: np.mean([table[p] for p in table if kind(p) in kinds]) for name, kinds in classes.items()}
    assert cost["same voicing and nasality"] < cost["voicing"] < cost["nasality"]
    assert heard["same voicing and nasality"] > heard["voicing"] > heard["nasality"]


@pytest.mark.xfail(strict=True, reason="the hand costs price a voicing-only change (P/B, S/Z: 0.2) no higher than "
                   "a place-only change (mean 0.21), where the table finds voicing-only pairs confused about a sixth "
                   "as often; left so because both example recognisers confuse voicing-only pairs most "
                   "(stages/lexicon/README.md, 'Against a published consonant confusion table')")
def test_a_voicing_only_change_costs_more_than_a_place_only_change() -> None:
    table = confusions()
    voicing = [symmetric(HAND, p) for p in table if kind(p) == "voicing only"]
    place = [symmetric(HAND, p) for p in table if kind(p) == "place only"]
    assert np.mean(voicing) > np.mean(place)

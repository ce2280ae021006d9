"""Stage `lexicon`: find domain terms in the N-best by how they sound, and correct misheard ones.

Three ways of finding entries, run in this order per message, each leaving the words it
placed to the next: the general search (every span of the N-best, guarded against
over-correction; stages.lexicon.general), the anchored search (names right after a word that
announces their type; stages.lexicon.anchored) and carrier phrases (slots of in-domain lines
that everyday words hold; stages.lexicon.carrier). What they place becomes the entities and
corrections in the text of the top hypothesis; every guard that stops a change is traced.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any, ClassVar

from pydantic import BaseModel

from relay.core.errors import StageError
from relay.core.stage import StageContext
from relay.core.utterance import Correction, Entity, Utterance
from stages.indomain.carriers import CarrierPhrases
from stages.indomain.hints import slot_neighbours
from stages.lexicon.anchored import AnchoredSearch
from stages.lexicon.carrier import CarrierSearch
from stages.lexicon.choice import Choice, describe, reading_otherwise, support
from stages.lexicon.compile import CompiledLexicon, load_compiled
from stages.lexicon.context import ContextScorer
from stages.lexicon.data import read_speakers
from stages.lexicon.general import GeneralSearch
from stages.lexicon.heard import heard_reading
from stages.lexicon.rewrite import rewrite
from stages.lexicon.settings import LexiconSettings
from stages.lexicon.sound.costfile import read_costs
from stages.lexicon.sound.phonetics import CostModel
from stages.lexicon.sound.pronounce import Pronouncer, common_words
from stages.lm.model import shared_model
from stages.normalize.word_probs import token_probs

__all__ = ["LexiconSettings", "LexiconStage"]


def _backing(choice: Choice, choices: list[Choice], utterance: Utterance, overridden: float) -> dict[str, Any]:
    """How the N-best backs a placed entry: the gate reads these (Entity's evidence fields)."""
    posteriors = [h.posterior for h in utterance.nbest]
    sightings = choice.evidence.per_hypothesis
    margin = choice.margin
    if margin is None:
        rivals = [c.score for c in choices if c.evidence.entry != choice.evidence.entry and c.overlaps(choice)]
        margin = choice.score - max(rivals) if rivals else choice.score
    return {"support": round(support(choice, utterance.nbest), 6),
            "heard_exactly": round(sum(posteriors[h] for h, s in sightings.items() if s.exact), 6),
            "margin": round(margin, 6), "overridden": round(overridden, 6), "origin": "exact" if choice.exact else choice.origin}


class LexiconStage:
    """Phonetic lexicon matching over the whole N-best."""

    name: ClassVar[str] = "lexicon"
    Settings: ClassVar[type[BaseModel]] = LexiconSettings
    needs: ClassVar[frozenset[str]] = frozenset({"message", "tokens", "posterior"})
    provides: ClassVar[frozenset[str]] = frozenset({"entities", "corrections"})

    def __init__(self, settings: LexiconSettings, *, context: StageContext) -> None:
        self.settings = settings
        self.context = context
        s = settings
        self.lexicon_path = context.require_file("lexicon", s.lexicon, stage=self.name, setting="lexicon")
        self.speakers_path = context.domain_file("speakers", s.speakers)
        # With both weights at 0 the model would change no score: it is not even read.
        weighed = s.context.gain_weight or s.context.loss_weight
        self.lm_path = context.domain_file("language_model", s.context.language_model) if weighed else None
        self.carrier_path = context.domain_file("text", s.carrier.text)
        self.costs_path = context.resolve(s.match.costs) if s.match.costs is not None else None
        self.files = {"lexicon": self.lexicon_path, "speakers": self.speakers_path,
                     "language model": self.lm_path, "carrier phrases": self.carrier_path,
                     "phone costs": self.costs_path}
        self.compiled: CompiledLexicon | None = None
        self.loaded_from_cache = False
        self.lm: Any = None  # the in-domain language model (kenlm), shared with lm_rescore
        self.general: GeneralSearch | None = None
        self.zipf: dict[str, float] = {}  # the common-word list's Zipf frequencies, once loaded
        self.anchored: AnchoredSearch | None = None
        self.carrier: CarrierSearch | None = None

    @property
    def _lexicon(self) -> CompiledLexicon:
        if self.compiled is None:
            raise StageError(self.name, "process() called before load()")
        return self.compiled

    def load(self) -> None:
        s = self.settings
        self.pronouncer = Pronouncer()
        # Learned costs only when asked for: the hand costs stay the default (see README, "Learned costs").
        self.costs = read_costs(self.costs_path) if self.costs_path is not None else CostModel.features()
        self.compiled, self.loaded_from_cache = load_compiled(
            self.lexicon_path, self.context.cache_dir, self.pronouncer,
            progress=self.context.progress, max_postings=s.match.max_postings)
        ids = {entry.id for entry in self.compiled.entries}
        affinity = read_speakers(self.speakers_path, ids) if self.speakers_path else {}
        phrases = None
        if self.carrier_path is not None:
            phrases = CarrierPhrases.from_files(self.carrier_path, self.lexicon_path, loose_from=s.carrier.loose_from)
        learned = slot_neighbours(line for _, line in phrases.lines) if phrases is not None else None
        written = s.hints if s.hints is not None else learned.hints(
            min_count=s.derive.hint_count, min_share=s.derive.hint_share) if learned else {}
        hints = {entity_type: set(words) for entity_type, words in written.items()}
        anchors = s.anchored.hints if s.anchored.hints is not None else learned.anchors(
            min_count=s.derive.anchor_count, min_share=s.derive.anchor_share) if learned else {}
        types = s.anchored.types
        if s.anchored.hints is None:  # right after the type's hints and anchors
            anchors = {t: sorted(set(anchors.get(t, ())) | set(written.get(t, ()))) for t in types}
        self.learned = {"hints": written, "anchors": anchors, "types": types}
        self.lm = shared_model(self.lm_path) if self.lm_path is not None else None
        zipf = self.zipf = common_words()
        common = {w for w, z in zipf.items() if z >= s.general.common_zipf}
        self.general = GeneralSearch(s, self.compiled, pronouncer=self.pronouncer, costs=self.costs,
                                     common=common, zipf=zipf, hints=hints, affinity=affinity)
        self.anchored = None
        if types:
            self.anchored = AnchoredSearch(s.anchored, self.compiled, types=types, anchors=anchors, pronouncer=self.pronouncer, costs=self.costs,
                                           hints=hints, model=self.lm, cap=s.context.cap)
        self.carrier = None
        if phrases is not None:
            self.carrier = CarrierSearch(s.carrier, phrases, self.compiled, pronouncer=self.pronouncer,
                                         costs=self.costs, align_floor=s.anchored.align_floor, zipf=zipf)

    def process(self, utterance: Utterance) -> Utterance:
        general = self.general
        if general is None:
            raise StageError(self.name, "process() called before load()")
        if not utterance.nbest:
            return utterance
        top = utterance.nbest.index(utterance.best)
        tokens = utterance.nbest[top].tokens
        strong = general.entries(utterance, top)
        context = None
        if self.lm is not None and (strong or self.anchored is not None or self.carrier is not None):
            context = ContextScorer(self.lm, tokens, cap=self.settings.context.cap)
        choices = [general.choose(e, utterance, top, context) for e in strong]
        g = self.settings.general
        probs = token_probs(utterance, tokens) if g.heard_sureness else None
        placed, blocked = general.place(choices, tokens, utterance.nbest, probs)
        utterance.check_deadline()
        if self.anchored is not None:
            placed += self.anchored.recall(utterance, top, placed, blocked, context)
        carrier: list[dict[str, Any]] = []
        utterance.check_deadline()
        if self.carrier is not None:
            found, carrier = self.carrier.recall(utterance, top, placed, context)
            placed += found
        placed += general.written_back(choices, placed, utterance, top)
        self._finish(utterance, top, placed, blocked, choices, probs)
        if carrier:
            utterance.note(carrier=carrier)
        return utterance

    def _finish(self, utterance: Utterance, top: int, placed: list[Choice], blocked: list[dict[str, Any]],
                choices: list[Choice], probs: Sequence[float | None] | None) -> None:
        """Entities, corrections and the rewritten text from what was placed; the trace."""
        lexicon = self._lexicon
        tokens = utterance.nbest[top].tokens
        replacements = [(c.start, c.end, lexicon.forms[c.form].text if not c.exact
                         else " ".join(tokens[c.start:c.end])) for c in placed]
        text, char_spans = rewrite(tokens, replacements)
        corrections = 0
        for choice, (start, end, after), span in sorted(zip(placed, replacements, char_spans),
                                                        key=lambda item: item[2]):
            entry = lexicon.entries[choice.evidence.entry]
            heard = " ".join(tokens[start:end])
            score = min(1.0, max(0.0, choice.score))
            replaced = not choice.exact and heard != after
            # How sure the N-best was of the words the correction overwrote (the reading every
            # correction had to beat): the gate weighs a correction that beat a strong one.
            overridden = heard_reading(
                tokens[start:end], utterance.nbest, self.zipf,
                holding=reading_otherwise(choice, utterance.nbest, tokens[start:end]),
                probs=probs[start:end] if probs else None, sureness=self.settings.general.heard_sureness,
            )[0] if replaced else 0.0
            utterance.entities.append(Entity(entry.id, entry.type, entry.name, span, heard, score,
                                             **_backing(choice, choices, utterance, overridden)))
            if replaced:
                corrections += 1
                utterance.corrections.append(Correction(
                    self.name, heard, after, score,
                    f"sounds like {entry.id} (pooled {choice.evidence.pooled:.2f} over "
                    f"{len(choice.evidence.per_hypothesis)} hypotheses)"))
        if corrections:
            utterance.chosen_text = text
        utterance.note(
            candidates=[describe(c, lexicon, tokens) for c in sorted(choices, key=lambda c: -c.score)
                        [: self.settings.trace_top]],
            blocked=blocked, entities=len(placed), corrections=corrections)

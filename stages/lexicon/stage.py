"""Stage `lexicon`: find domain terms in the N-best by how they sound, and correct misheard ones.

Order of work per message: spans of every hypothesis -> candidates from the phone index ->
pair scores -> evidence pooled over the N-best by posterior -> personal and entry priors ->
guards (exact text kept, common words, margin, type hints) -> entities and corrections in the
text of the best hypothesis. Every guard that stops a change is written to the trace.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any, ClassVar

from pydantic import BaseModel

from relay.core.errors import StageError
from relay.core.stage import StageContext
from relay.core.utterance import Correction, Entity, Hypothesis, Utterance
from stages.indomain.carriers import CarrierPhrases, Unfilled
from stages.lexicon.anchored import (
    AnchoredForms,
    AnchoredHypothesis,
    anchor_positions,
    anchored_forms,
    anchored_matches,
    pool_anchored,
)
from stages.lexicon.compile import CompiledLexicon, load_compiled
from stages.lexicon.context import ContextScorer
from stages.lexicon.data import read_speakers
from stages.lexicon.match import Evidence, Sighting, Weights, best_entries, find_spans, pool, score_spans
from stages.lexicon.rewrite import map_span, rewrite
from stages.lexicon.settings import LexiconSettings
from stages.lexicon.sound.phonetics import CostModel
from stages.lexicon.sound.pronounce import Pronouncer, common_words
from stages.lm.model import shared_model

__all__ = ["LexiconSettings", "LexiconStage"]


@dataclass(slots=True)
class _Choice:
    evidence: Evidence
    score: float
    start: int  # word range in the best hypothesis
    end: int
    form: int
    exact: bool
    hint_missing: bool
    lm_gain: float = 0.0


def _likeliest(nbest: Sequence[Hypothesis], best: int, count: int) -> list[int]:
    """``best`` and then the likeliest other hypotheses, ``count`` in all."""
    others = sorted((h for h in range(len(nbest)) if h != best), key=lambda h: -nbest[h].posterior)
    return [best] + others[: count - 1]


class LexiconStage:
    """Phonetic lexicon matching over the whole N-best."""

    name: ClassVar[str] = "lexicon"
    Settings: ClassVar[type[BaseModel]] = LexiconSettings
    needs: ClassVar[frozenset[str]] = frozenset({"tokens", "posterior"})
    provides: ClassVar[frozenset[str]] = frozenset({"entities"})

    def __init__(self, settings: LexiconSettings, *, context: StageContext) -> None:
        self.settings = settings
        self.context = context
        s = settings
        self.lexicon_path = context.require_file("lexicon", s.lexicon, stage=self.name, setting="lexicon")
        self.speakers_path = context.domain_file("speakers", s.speakers)
        self.lm_path = context.domain_file("language_model", s.context.language_model) if s.context.gain_weight or s.context.loss_weight else None
        self.carrier_path = context.domain_file("text", s.carrier.text)
        self.uses = {"lexicon": self.lexicon_path, "speakers": self.speakers_path,
                     "language model": self.lm_path, "carrier phrases": self.carrier_path}
        self.compiled: CompiledLexicon | None = None
        self.affinity: dict[str, dict[str, float]] = {}
        self.loaded_from_cache = False

    @property
    def _lexicon(self) -> CompiledLexicon:
        if self.compiled is None:
            raise StageError(self.name, "process() called before load()")
        return self.compiled

    def load(self) -> None:
        s = self.settings
        self.pronouncer = Pronouncer()
        self.common = {w for w, z in common_words().items() if z >= s.general.common_zipf}
        self.costs = CostModel.features()
        self.weights = Weights(s.match.weight_phone, s.match.weight_spelling, s.match.weight_keys, s.match.candidates, s.match.min_retrieval,
                               s.match.pair_floor, s.match.min_phone, align_floor=s.match.align_floor)
        self.compiled, self.loaded_from_cache = load_compiled(
            self.lexicon_path, self.context.cache_dir, self.pronouncer,
            progress=self.context.progress, max_postings=s.match.max_postings)
        ids = {entry.id for entry in self.compiled.entries}
        self.affinity = read_speakers(self.speakers_path, ids) if self.speakers_path else {}
        self.hints = {kind: set(words) for kind, words in s.hints.items()}
        self.slots: dict[str, AnchoredForms] = anchored_forms(self.compiled, s.anchored.types, min_phones=s.anchored.min_phones)
        self.carriers = None if self.carrier_path is None else CarrierPhrases.from_files(
            self.carrier_path, self.lexicon_path, loose_from=s.carrier.loose_from)
        self.carrier_slots = {} if self.carriers is None else anchored_forms(
            self.compiled, sorted({entry.type for entry in self.compiled.entries}))
        self.lm = shared_model(self.lm_path) if self.lm_path is not None else None

    def process(self, utterance: Utterance) -> Utterance:
        lexicon = self._lexicon
        if not utterance.nbest:
            return utterance
        s = self.settings
        best = utterance.nbest.index(utterance.best)
        longest = s.max_span_words or lexicon.max_words + 1
        spans = find_spans(utterance.nbest, longest, self.pronouncer)
        pairs = score_spans(spans, lexicon, self.weights, self.costs)
        posteriors = [h.posterior for h in utterance.nbest]
        evidence = pool(spans, pairs, lexicon, posteriors)
        # Entries too weak to be corrected or traced are not carried any further.
        floor = min(s.general.min_score, s.match.pair_floor) * min(1.0, max(posteriors)) - s.priors.affinity_weight - s.priors.entry_weight
        strong = [e for e in best_entries(evidence, max(12, s.trace_top)) if e.pooled >= floor or best in e.per_hypothesis]
        tokens = utterance.nbest[best].tokens
        context = ContextScorer(self.lm, tokens, cap=s.context.cap) if self.lm is not None and strong else None
        choices = [self._choose(e, utterance, best, context) for e in strong]
        exacts = sorted((c for c in choices if c.exact), key=lambda c: (c.start - c.end, -c.score))
        fuzzy = sorted((c for c in choices if not c.exact), key=lambda c: (-c.score, c.start - c.end))
        placed: list[_Choice] = []
        blocked: list[dict[str, Any]] = []
        # Corrections first, so one that keeps an exactly matching alias and explains more words
        # ("tamsin okorra" -> "tamsin okara") can supersede it; any other overlap with exact text
        # is blocked. Then the exact matches that remain free.
        for choice in fuzzy:
            reason = self._guard(choice, placed, choices, exacts, tokens)
            if reason is None:
                placed.append(choice)
            elif choice.score >= s.match.pair_floor:
                blocked.append(self._describe(choice, tokens) | {"guard": reason})
        for choice in exacts:
            taken = [c for c in placed if c.start < choice.end and choice.start < c.end]
            if not taken:
                placed.append(choice)
            elif taken[0].evidence.entry != choice.evidence.entry:
                blocked.append(self._describe(choice, tokens) | {"guard": "superseded" if any(
                    self._supersedes(c, choice, tokens) for c in taken) else "overlap"})
        if self.slots:
            if context is None and self.lm is not None:
                context = ContextScorer(self.lm, tokens, cap=s.context.cap)
            placed += self._slot_recall(utterance, best, placed, blocked, context)
        carrier: list[dict[str, Any]] = []
        if self.carriers is not None:
            if context is None and self.lm is not None:
                context = ContextScorer(self.lm, tokens, cap=s.context.cap)
            found, carrier = self._carrier_recall(self.carriers, utterance, best, placed, context)
            placed += found
        self._finish(utterance, best, placed, blocked, choices)
        if carrier:
            utterance.note(carrier=carrier)
        return utterance

    def _carrier_recall(self, carriers: CarrierPhrases, utterance: Utterance, best: int, placed: list[_Choice],
                        context: ContextScorer | None) -> tuple[list[_Choice], list[dict[str, Any]]]:
        """Entries of the types a carrier phrase expects where everyday words hold its slots.

        With the entities found so far marked, an in-domain line that matches a hypothesis
        word for word except for slots held by everyday words pins down both each slot's words
        and its type ("meet me in they won" against "meet me in {place}"), so those exact words
        are aligned with every form of that type, with a floor of their own and a lead over the
        next entry. The LM gain is only traced: on the workshop corpus, wrong fills gained as
        much as right ones. Every empty slot of the match is tried, in the best hypothesis and
        the likeliest others (``carrier_hypotheses`` in all), and each slot takes its best fill.
        Returns the fills and one trace record per slot tried.
        """
        s = self.settings
        nbest = utterance.nbest
        tokens = nbest[best].tokens
        attempts: list[tuple[_Choice | None, dict[str, Any]]] = []
        tried: set[tuple[str, str]] = set()
        for source in _likeliest(nbest, best, s.carrier.hypotheses):
            heard = nbest[source].tokens
            spans = sorted((map_span(tokens, heard, c.start, c.end), self._lexicon.entries[c.evidence.entry].type)
                           for c in placed)
            marked: list[str] = []
            where: list[int] = []  # marked position -> token position in the hypothesis
            at = 0
            for (start, end), kind in spans:
                if start < at or end <= start:
                    continue
                marked += heard[at:start] + ["{" + kind + "}"]
                where += list(range(at, start + 1))
                at = end
            marked += heard[at:]
            where += list(range(at, len(heard)))
            for empty in carriers.empty_slots(marked):
                if empty.type in self.carrier_slots and (empty.type, empty.words) not in tried:
                    tried.add((empty.type, empty.words))  # the same words in another hypothesis: the same fill
                    attempts.append(self._carrier_fill(empty, source, heard, where[empty.start],
                                                       where[empty.end - 1] + 1, tokens, context))
        # Each slot takes its best-aligned fill: best first, at a tie the likelier hypothesis (a
        # stable sort); a fill that overlaps one already placed is dropped.
        found: list[_Choice] = []
        notes: list[dict[str, Any]] = []
        for choice, note in sorted(attempts, key=lambda a: -a[1].get("phone", 0.0)):
            if choice is not None and any(c.evidence.entry == choice.evidence.entry or (
                    c.start < choice.end and choice.start < c.end) for c in placed + found):
                note["guard"] = "overlap"
            elif choice is not None:
                found.append(choice)
            notes.append(note)
        return found, notes

    def _carrier_fill(self, empty: Unfilled, source: int, heard: list[str], start: int, end: int,
                      tokens: list[str], context: ContextScorer | None) -> tuple[_Choice | None, dict[str, Any]]:
        """The entry that best fits one empty slot, the words ``start:end`` of hypothesis
        ``source`` (``heard``), when it clears the carrier floor and margin; and the trace record."""
        s = self.settings
        lexicon = self._lexicon
        note: dict[str, Any] = {"template": empty.template, "where": empty.where, "heard": empty.words,
                                "type": empty.type, "hypothesis": source}
        phones = "".join(self.pronouncer.word(token) for token in heard[start:end])
        matches = anchored_matches([AnchoredHypothesis([phones], [0])], self.carrier_slots[empty.type], lexicon, self.costs,
                               max_words=1, min_phone=0.0, align_floor=s.anchored.align_floor)
        if not matches:
            return None, note | {"guard": "carrier_phone"}
        match = matches[0]
        form = lexicon.forms[match.form]
        start, end = map_span(heard, tokens, start, end)
        gain = context.gain(start, end, form.text.split()) if context is not None else 0.0
        note |= {"id": lexicon.entries[form.entry].id, "form": form.text, "phone": round(match.phone, 4),
                 "runner_up": round(match.runner_up, 4), "lm_gain": round(gain, 3)}
        if match.phone < s.carrier.min_phone:
            return None, note | {"guard": "carrier_phone"}
        if match.phone - match.runner_up < s.carrier.margin:
            return None, note | {"guard": "carrier_margin"}
        if end <= start:
            return None, note | {"guard": "overlap"}
        support = {source: Sighting(match.phone, start, end, match.form, False)}
        return _Choice(Evidence(form.entry, match.phone, support), match.phone, start, end, match.form,
                       False, False, gain), note

    def _slot_recall(self, utterance: Utterance, best: int, placed: list[_Choice], blocked: list[dict[str, Any]],
                     context: ContextScorer | None) -> list[_Choice]:
        """Names of the slot types, looked for where a hint word or the sentence start announces one.

        The ``slot_hypotheses`` likeliest hypotheses are searched, each after its own hint words
        (a hint the best hypothesis misheard may survive in another), and each entry's matches
        are pooled by posterior. The span of the hypothesis contributing most is carried over to
        the best one. A match needs the looser phone floor, ``slot_min_pooled`` pooled evidence
        and, with a language model, its hypothesis must read at least ``slot_min_gain`` nats
        likelier with the name in it: sound and context agree.
        """
        s = self.settings
        lexicon = self._lexicon
        nbest = utterance.nbest
        tokens = nbest[best].tokens
        order = _likeliest(nbest, best, s.anchored.hypotheses)
        sounds = [[self.pronouncer.word(token) for token in nbest[h].tokens] for h in order]
        posteriors = [nbest[h].posterior for h in order]
        taken = [(c.start, c.end) for c in placed]
        entries = {c.evidence.entry for c in placed}
        scorers: dict[int, ContextScorer | None] = {best: context}
        found: list[_Choice] = []
        for kind, slot in self.slots.items():
            hints = self.hints.get(kind, set()) | set(s.anchored.hints.get(kind, ()))
            searched = [AnchoredHypothesis(sounds[i], anchor_positions(nbest[h].tokens, hints, at_start=s.anchored.at_start),
                                       taken if h == best else ()) for i, h in enumerate(order)]
            matches = anchored_matches(searched, slot, lexicon, self.costs, max_words=s.anchored.max_words,
                                   min_phone=s.anchored.floors.get(kind, s.anchored.min_phone), align_floor=s.anchored.align_floor)
            for pooled in pool_anchored(matches, posteriors, lexicon):
                match = pooled.strongest
                source = order[match.hypothesis]
                form = lexicon.forms[match.form]
                start, end = map_span(nbest[source].tokens, tokens, match.start, match.end)
                if end <= start or form.entry in entries or any(b < end and start < e for b, e in taken):
                    continue
                if " ".join(tokens[start:end]) == form.text:
                    continue  # exact text is the general matcher's job
                if source not in scorers:
                    scorers[source] = ContextScorer(self.lm, nbest[source].tokens, cap=s.context.cap) if self.lm else None
                scorer = scorers[source]
                # The context is judged where the name was heard, with the hint word that hypothesis holds.
                gain = scorer.gain(match.start, match.end, form.text.split()) if scorer is not None else 0.0
                support = {order[i]: Sighting(m.phone, m.start, m.end, m.form, False) for i, m in pooled.support.items()}
                choice = _Choice(Evidence(form.entry, pooled.pooled, support), match.phone, start, end,
                                 match.form, False, False, gain)
                if pooled.pooled < s.anchored.min_pooled:
                    reason = "slot_pooled"
                elif match.phone - match.runner_up < s.anchored.margin:
                    reason = "slot_margin"
                elif scorer is not None and gain < min(s.anchored.min_gain, s.context.cap):  # the gain is clipped too
                    reason = "slot_context"
                else:
                    found.append(choice)
                    taken.append((start, end))
                    entries.add(form.entry)
                    continue
                blocked.append(self._describe(choice, tokens) | {"guard": reason})
        return found

    def _supersedes(self, longer: _Choice, exact: _Choice, tokens: list[str]) -> bool:
        """Whether ``longer`` spans ``exact`` and keeps its words, so replacing is no loss."""
        if not (longer.start <= exact.start and exact.end <= longer.end
                and longer.end - longer.start > exact.end - exact.start):
            return False
        kept = " " + " ".join(tokens[exact.start:exact.end]) + " "
        return kept in " " + self._lexicon.forms[longer.form].text + " "

    def _choose(self, evidence: Evidence, utterance: Utterance, best: int,
                context: ContextScorer | None) -> _Choice:
        lexicon = self._lexicon
        entry = lexicon.entries[evidence.entry]
        score = evidence.pooled + self.settings.priors.entry_weight * math.log(entry.weight)
        if utterance.speaker is not None:
            score += self.settings.priors.affinity_weight * self.affinity.get(utterance.speaker, {}).get(entry.id, 0.0)
        held = evidence.per_hypothesis.get(best)
        support = evidence.per_hypothesis
        source = max(support, key=lambda h: utterance.nbest[h].posterior * support[h].score)
        if held is not None and held.score >= 0.9 * support[source].score:
            start, end, form, exact = held.start, held.end, held.form, held.exact
        else:
            # The best hypothesis holds the entry weakly or not at all: carry the span that
            # supports it most over to the best hypothesis.
            strongest = support[source]
            start, end = map_span(utterance.nbest[source].tokens, utterance.nbest[best].tokens,
                                  strongest.start, strongest.end)
            form, exact = strongest.form, False
        hints = self.hints.get(entry.type)
        before = utterance.nbest[best].tokens[max(0, start - self.settings.general.hint_window):start]
        hint_missing = bool(hints) and not hints.intersection(before)  # type: ignore[union-attr]
        if hints and not hint_missing:
            score += self.settings.general.hint_bonus  # the context announces this type: a prior like affinity
        lm_gain = 0.0
        if context is not None and not exact:
            # Noisy channel: the sound says how well the span matches, the in-domain LM how
            # much likelier the sentence reads once rewritten.
            lm_gain = context.gain(start, end, lexicon.forms[form].text.split())
            # A rewrite the domain finds less likely is strong evidence against it (an everyday
            # word pulled into a name); a likelier one is weaker evidence for it, since
            # replacing any out-of-vocabulary word gains, so the two sides weigh differently.
            score += (self.settings.context.gain_weight if lm_gain > 0 else self.settings.context.loss_weight) * lm_gain
        return _Choice(evidence, score, start, end, form, exact, hint_missing, lm_gain)

    def _guard(self, choice: _Choice, placed: list[_Choice], choices: list[_Choice],
               exacts: list[_Choice], tokens: list[str]) -> str | None:
        """None when a correction may stand; else the name of the guard that stops it."""
        s = self.settings

        def overlapping(c: _Choice) -> bool:
            return c.start < choice.end and choice.start < c.end

        if choice.score < s.general.min_score:
            return "min_score"
        if " ".join(tokens[choice.start:choice.end]) in self._lexicon.exact or any(
                overlapping(e) and not self._supersedes(choice, e, tokens) for e in exacts):
            return "exact_text_kept"
        if any(overlapping(c) for c in placed):
            return "overlap"
        words = tokens[choice.start:choice.end]
        # Priors count here too: on the workshop corpus, judging common words on acoustic
        # evidence alone lost a tenth of the recall for a small gain in precision.
        needed = s.general.common_min_score - s.general.common_relief * max(0, len(words) - 1)
        if words and all(w in self.common for w in words) and choice.score < needed:
            return "common_words"
        rivals = [c.score for c in choices if c.evidence.entry != choice.evidence.entry and overlapping(c)
                  and not (c.exact and self._supersedes(choice, c, tokens))]
        if rivals and choice.score - max(rivals) < s.general.margin:
            return "margin"
        if (s.general.short_penalty and len(self._lexicon.forms[choice.form].phones) <= s.general.short_phones
                and choice.score < s.general.min_score + s.general.short_penalty):
            return "short_form"  # a few phones match many everyday words by chance ("for" -> "bay four")
        if choice.hint_missing and choice.score < s.general.min_score + s.general.hint_penalty:
            return "type_hint"  # a hinted type without its hint word needs hint_penalty more evidence
        return None

    def _describe(self, choice: _Choice, tokens: list[str]) -> dict[str, Any]:
        lexicon = self._lexicon
        return {"id": lexicon.entries[choice.evidence.entry].id,
                "heard": " ".join(tokens[choice.start:choice.end]),
                "form": lexicon.forms[choice.form].text, "score": round(choice.score, 4),
                "pooled": round(choice.evidence.pooled, 4), "lm_gain": round(choice.lm_gain, 3), "hypotheses": len(choice.evidence.per_hypothesis)}

    def _finish(self, utterance: Utterance, best: int, placed: list[_Choice],
                blocked: list[dict[str, Any]], choices: list[_Choice]) -> Utterance:
        lexicon = self._lexicon
        tokens = utterance.nbest[best].tokens
        replacements = [(c.start, c.end, lexicon.forms[c.form].text if not c.exact
                         else " ".join(tokens[c.start:c.end])) for c in placed]
        text, char_spans = rewrite(tokens, replacements)
        corrections = 0
        for choice, (start, end, after), span in sorted(zip(placed, replacements, char_spans),
                                                        key=lambda item: item[2]):
            entry = lexicon.entries[choice.evidence.entry]
            heard = " ".join(tokens[start:end])
            score = min(1.0, max(0.0, choice.score))
            utterance.entities.append(Entity(entry.id, entry.type, entry.name, span, heard, score))
            if not choice.exact and heard != after:
                corrections += 1
                utterance.corrections.append(Correction(
                    self.name, heard, after, score,
                    f"sounds like {entry.id} (pooled {choice.evidence.pooled:.2f} over "
                    f"{len(choice.evidence.per_hypothesis)} hypotheses)"))
        if corrections:
            utterance.chosen_text = text
        utterance.note(
            candidates=[self._describe(c, tokens) for c in sorted(choices, key=lambda c: -c.score)
                        [: self.settings.trace_top]],
            blocked=blocked, entities=len(placed), corrections=corrections)
        return utterance

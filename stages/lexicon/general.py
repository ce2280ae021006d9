"""The general search: every span of the N-best against the whole lexicon, and its guards.

Spans -> candidates from the phone index -> pair scores -> evidence pooled over the N-best
(stages.lexicon.match) -> the entries strong enough to go on -> a score with the priors, the
type hints and the language model's view -> placed in the top hypothesis unless a guard
(exact text kept, common words, margin, short form, type hint) stops it. Every guard that
stops a correction is named in the trace.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

from relay.core.utterance import Hypothesis, Utterance
from stages.lexicon.choice import Choice, describe, reading_otherwise, support
from stages.lexicon.compile import CompiledLexicon
from stages.lexicon.context import ContextScorer
from stages.lexicon.heard import heard_reading
from stages.lexicon.match import Evidence, Weights, best_entries, find_spans, pool, score_spans
from stages.lexicon.realign import realign
from stages.lexicon.rewrite import map_span, runs_of
from stages.lexicon.settings import LexiconSettings
from stages.lexicon.sound.phonetics import CostModel, similarity
from stages.lexicon.sound.pronounce import Pronouncer

__all__ = ["GeneralSearch"]


class GeneralSearch:
    """Finds entries anywhere in the N-best; ``place`` keeps the ones its guards let through."""

    def __init__(self, settings: LexiconSettings, lexicon: CompiledLexicon, *, pronouncer: Pronouncer,
                 costs: CostModel, common: set[str], zipf: dict[str, float], hints: dict[str, set[str]],
                 affinity: dict[str, dict[str, float]]) -> None:
        self.settings = settings
        self.lexicon = lexicon
        self.pronouncer = pronouncer
        self.costs = costs
        self.common = common  # words at or above general.common_zipf
        self.zipf = zipf  # every word of the common-word list with its Zipf frequency
        self.hints = hints
        self.affinity = affinity
        self.weights = Weights.of(settings.match)
        self.entry_forms: dict[int, list[tuple[int, list[str]]]] = {}  # entry -> (form number, its words)
        for number, form in enumerate(lexicon.forms):
            self.entry_forms.setdefault(form.entry, []).append((number, form.text.split()))

    def entries(self, utterance: Utterance, top: int) -> list[Evidence]:
        """The entries the N-best supports enough to be corrected or traced, strongest first."""
        s = self.settings
        lexicon = self.lexicon
        longest = s.max_span_words or lexicon.max_words + 1
        spans = find_spans(utterance.nbest, longest, self.pronouncer)
        utterance.check_deadline()  # each step's cost grows with the message: a late one stops here
        pairs = score_spans(spans, lexicon, self.weights, self.costs)
        utterance.check_deadline()
        posteriors = [h.posterior for h in utterance.nbest]
        evidence = pool(spans, pairs, lexicon, posteriors)
        count = max(12, s.trace_top)
        if s.match.realign_slack is not None:
            realign(evidence, best_entries(evidence, count), spans, lexicon, utterance.nbest, self.weights,
                    self.costs, slack=s.match.realign_slack)
        # Entries too weak to be corrected or traced are not carried any further.
        floor = (min(s.general.min_score, s.match.pair_floor) * min(1.0, max(posteriors))
                 - s.priors.affinity_weight - s.priors.entry_weight)
        return [e for e in best_entries(evidence, count) if e.pooled >= floor or top in e.per_hypothesis]

    def choose(self, evidence: Evidence, utterance: Utterance, top: int,
               context: ContextScorer | None) -> Choice:
        """Where ``evidence``'s entry goes in the top hypothesis, and its score there."""
        s = self.settings
        lexicon = self.lexicon
        entry = lexicon.entries[evidence.entry]
        score = evidence.pooled
        for term in self._priors(evidence.entry, utterance.speaker):
            score += term
        support = evidence.per_hypothesis
        held = support.get(top)
        from_hypothesis = max(support, key=lambda h: utterance.nbest[h].posterior * support[h].score)
        if held is not None and held.score >= 0.9 * support[from_hypothesis].score:
            start, end, form, exact = held.start, held.end, held.form, held.exact
        else:
            # The top hypothesis holds the entry weakly or not at all: carry the span that
            # supports it most over to the top hypothesis.
            carried = support[from_hypothesis]
            start, end = map_span(utterance.nbest[from_hypothesis].tokens, utterance.nbest[top].tokens,
                                  carried.start, carried.end)
            form, exact = carried.form, False
        hint_missing, bonus = self._hint(entry.type, utterance.nbest[top].tokens, start)
        score += bonus
        lm_gain = 0.0
        if context is not None and not exact:
            # Noisy channel: the sound says how well the span matches, the in-domain LM how
            # much likelier the sentence reads once rewritten.
            lm_gain = context.gain(start, end, lexicon.forms[form].text.split())
            # A rewrite the domain finds less likely is strong evidence against it (an everyday
            # word pulled into a name); a likelier one is weaker evidence for it, since
            # replacing any out-of-vocabulary word gains, so the two sides weigh differently.
            score += (s.context.gain_weight if lm_gain > 0 else s.context.loss_weight) * lm_gain
        return Choice(evidence, score, start, end, form, exact, hint_missing, lm_gain)

    def _priors(self, entry: int, speaker: str | None) -> list[float]:
        """What the entry's weight and the speaker's affinity add to its pooled evidence, term by
        term (added in this order, so a score is the same float however it is reached)."""
        s = self.settings.priors
        found = self.lexicon.entries[entry]
        terms = [s.entry_weight * math.log(found.weight)]
        if speaker is not None:
            terms.append(s.affinity_weight * self.affinity.get(speaker, {}).get(found.id, 0.0))
        return terms

    def _hint(self, entry_type: str, tokens: Sequence[str], start: int) -> tuple[bool, float]:
        """Whether the type has hint words and none stands before ``start``; the score the
        context adds when one does (it announces this type: a prior like affinity)."""
        hints = self.hints.get(entry_type)
        if not hints:
            return False, 0.0
        if hints.intersection(tokens[max(0, start - self.settings.general.hint_window):start]):
            return False, self.settings.general.hint_bonus
        return True, 0.0

    def _written(self, choice: Choice, utterance: Utterance, top: int) -> Choice | None:
        """The exact choice for ``choice``'s entry where the top hypothesis holds one of its forms
        word for word, nearest the correction's range; None when it holds none. A near match of
        a longer form ("with diesel" -> "red diesel") wins an entry's sighting over the exact alias
        inside it ("diesel"), and a stopped correction must not lose the alias with it. Scored as
        the search scores: pooled over the hypotheses (1 where one has the form written, else its
        best sighting), with the entry's priors and any type hint before it."""
        evidence = choice.evidence
        tokens = utterance.nbest[top].tokens
        found = [(i, i + len(words), f, words) for f, words in self.entry_forms[evidence.entry]
                 for i in runs_of(words, tokens)]
        if not found:
            return None
        at, till, form, words = min(found, key=lambda s: (max(choice.start - s[1], s[0] - choice.end, 0), s[0] - s[1]))
        pooled = 0.0
        for h, hypothesis in enumerate(utterance.nbest):
            held = evidence.per_hypothesis.get(h)
            written = bool(runs_of(words, hypothesis.tokens))
            pooled += hypothesis.posterior * (1.0 if written else held.score if held is not None else 0.0)
        score = pooled
        for term in self._priors(evidence.entry, utterance.speaker):
            score += term
        hint_missing, bonus = self._hint(self.lexicon.entries[evidence.entry].type, tokens, at)
        return Choice(Evidence(evidence.entry, pooled, evidence.per_hypothesis), score + bonus, at, till, form,
                      True, hint_missing)

    def place(self, choices: list[Choice], tokens: list[str], nbest: Sequence[Hypothesis],
              probs: Sequence[float | None] | None = None) -> tuple[list[Choice], list[dict[str, Any]]]:
        """The choices that stand, and a trace record for each one a guard stopped; ``tokens``
        are the top hypothesis's, ``nbest`` the whole list, ``probs`` the recogniser's
        probability of each token where it gave them (stages.normalize.word_probs)."""
        exacts = sorted((c for c in choices if c.exact), key=lambda c: (c.start - c.end, -c.score))
        fuzzy = sorted((c for c in choices if not c.exact), key=lambda c: (-c.score, c.start - c.end))
        placed: list[Choice] = []
        blocked: list[dict[str, Any]] = []
        # Corrections first, so one that keeps an exactly matching alias and explains more words
        # ("tamsin okorra" -> "tamsin okara") can supersede it; any other overlap with exact text
        # is blocked. Then the exact matches that remain free.
        for choice in fuzzy:
            reason = self._guard(choice, placed, choices, exacts, tokens, nbest, probs)
            if reason is None:
                placed.append(choice)
            elif choice.score >= self.settings.match.pair_floor:
                blocked.append(describe(choice, self.lexicon, tokens) | {"guard": reason})
        for choice in exacts:
            taken = [c for c in placed if c.overlaps(choice)]
            if not taken:
                placed.append(choice)
            elif taken[0].evidence.entry != choice.evidence.entry:
                blocked.append(describe(choice, self.lexicon, tokens) | {"guard": "superseded" if any(
                    self._supersedes(c, choice, tokens) for c in taken) else "overlap"})
        return placed, blocked

    def written_back(self, choices: list[Choice], placed: list[Choice], utterance: Utterance,
                     top: int) -> list[Choice]:
        """The exact forms to keep for entries whose correction no search placed (``_written``),
        where their words are still free, longest first. Run after every search, so an exact alias
        does not take words a later search would correct."""
        done = {c.evidence.entry for c in placed}
        written = [self._written(c, utterance, top) for c in choices if not c.exact and c.evidence.entry not in done]
        kept: list[Choice] = []
        for exact in sorted((c for c in written if c is not None), key=lambda c: (c.start - c.end, -c.score)):
            if not any(exact.overlaps(c) for c in placed + kept):
                kept.append(exact)
        return kept

    def _kept_rest(self, heard: list[str], choice: Choice) -> float:
        """Phone similarity of the words a correction replaces, when it keeps words at either end
        ("the extractor" -> "big huff extractor": "the" against "big huff"); 1 when it keeps none.
        The replacing words sound as the entry's `say` has them, as the whole form does."""
        entry = self.lexicon.entries[choice.evidence.entry]
        form = self.lexicon.forms[choice.form].text.split()
        size = min(len(heard), len(form))
        head = next((i for i in range(size) if heard[i] != form[i]), size)
        tail = next((i for i in range(size - head) if heard[-1 - i] != form[-1 - i]), size - head)
        rest_heard, rest_form = heard[head:len(heard) - tail], form[head:len(form) - tail]
        if not (head or tail) or not rest_heard:
            return 1.0
        if not rest_form:
            return 0.0  # it would drop heard words and keep the rest: nothing it writes sounds like them
        replacing = self.pronouncer.form(" ".join(rest_form), name=entry.name, say=entry.say)
        return similarity(self.pronouncer.words(rest_heard), replacing, self.costs)

    def _supersedes(self, longer: Choice, exact: Choice, tokens: Sequence[str]) -> bool:
        """Whether ``longer`` spans ``exact`` and keeps its words, so replacing is no loss."""
        if not (longer.start <= exact.start and exact.end <= longer.end
                and longer.end - longer.start > exact.end - exact.start):
            return False
        kept = " " + " ".join(tokens[exact.start:exact.end]) + " "
        return kept in " " + self.lexicon.forms[longer.form].text + " "

    def _guard(self, choice: Choice, placed: list[Choice], choices: list[Choice], exacts: list[Choice],
               tokens: list[str], nbest: Sequence[Hypothesis], probs: Sequence[float | None] | None) -> str | None:
        """None when a correction may stand; else the name of the guard that stops it."""
        g = self.settings.general
        if choice.score < g.min_score:
            return "min_score"
        if " ".join(tokens[choice.start:choice.end]) in self.lexicon.exact or any(
                choice.overlaps(e) and not self._supersedes(choice, e, tokens) for e in exacts):
            return "exact_text_kept"
        if any(choice.overlaps(c) for c in placed):
            return "overlap"
        words = tokens[choice.start:choice.end]
        # Priors count here too: on the workshop corpus, judging common words on acoustic
        # evidence alone lost a tenth of the recall for a small gain in precision.
        needed = g.common_min_score - g.common_relief * max(0, len(words) - 1)
        if words and all(w in self.common for w in words) and choice.score < needed:
            return "common_words"
        rivals = [c.score for c in choices if c.evidence.entry != choice.evidence.entry and choice.overlaps(c)
                  and not (c.exact and self._supersedes(choice, c, tokens))]
        if rivals and choice.score - max(rivals) < g.margin:
            return "margin"
        short = len(self.lexicon.forms[choice.form].phones) <= g.short_phones
        if g.short_penalty and short and choice.score < g.min_score + g.short_penalty:
            return "short_form"  # a few phones match many everyday words by chance ("for" -> "bay four")
        if choice.hint_missing and choice.score < g.min_score + g.hint_penalty:
            return "type_hint"  # a hinted type without its hint word needs general.hint_penalty more
        if g.min_support and support(choice, nbest) < g.min_support:
            return "weak_sound"  # priors alone must not carry a rewrite: some hypothesis must sound like it
        if g.kept_min_phone and self._kept_rest(words, choice) < g.kept_min_phone:
            return "kept_words"
        # Two reasons for doubt add: a short form matches everyday words by chance, and these
        # words may have been said as heard ("we've run short" -> "we've wren short").
        floor = g.min_score + (g.heard_short_penalty if short else 0.0)
        belief, with_probs = heard_reading(words, nbest, self.zipf, holding=reading_otherwise(choice, nbest, words),
                                           probs=probs[choice.start:choice.end] if probs else None,
                                           sureness=g.heard_sureness)
        weight = g.heard_weight_probs if with_probs else g.heard_weight
        if weight and choice.score < floor + weight * belief:
            return "heard_right"
        return None


"""Carrier phrases: the slots of in-domain lines that everyday words hold, filled by sound.

With the entities found so far marked, an in-domain line that matches a hypothesis word for
word except for slots held by everyday words pins down both each slot's words and its type
("meet me in they won" against "meet me in {place}"), so those exact words are aligned with
every form of that type, with a floor of their own and a lead over the next entry. The lines
and their matching are stages.indomain.carriers; this module fills what they leave empty.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

from relay.core.utterance import Hypothesis, Utterance
from stages.indomain.carriers import CarrierPhrases, Unfilled
from stages.indomain.text import slot_marker
from stages.lexicon.anchored import AnchoredHypothesis, anchored_forms, anchored_matches
from stages.lexicon.choice import Choice, likeliest
from stages.lexicon.compile import CompiledLexicon
from stages.lexicon.context import ContextScorer
from stages.lexicon.heard import heard_belief
from stages.lexicon.match import Evidence, Sighting
from stages.lexicon.rewrite import map_span, runs_of
from stages.lexicon.settings import CarrierSettings
from stages.lexicon.sound.phonetics import CostModel
from stages.lexicon.sound.pronounce import Pronouncer

__all__ = ["CarrierSearch"]


class CarrierSearch:
    """Fills the empty slots of the carrier phrases that match the likeliest hypotheses."""

    def __init__(self, settings: CarrierSettings, phrases: CarrierPhrases, lexicon: CompiledLexicon, *,
                 pronouncer: Pronouncer, costs: CostModel, align_floor: float, zipf: dict[str, float]) -> None:
        self.settings = settings
        self.phrases = phrases
        self.lexicon = lexicon
        self.pronouncer = pronouncer
        self.costs = costs
        self.zipf = zipf
        # Slot fills are aligned like the anchored search's spans, and screened with its floor.
        self.align_floor = align_floor
        self.forms = anchored_forms(lexicon, sorted({entry.type for entry in lexicon.entries}))

    def recall(self, utterance: Utterance, top: int, placed: list[Choice],
               context: ContextScorer | None) -> tuple[list[Choice], list[dict[str, Any]]]:
        """The fills that stand, and one trace record per slot tried.

        The LM gain is only traced: on the workshop corpus, wrong fills gained as much as right
        ones. Every empty slot of a match is tried, in the top hypothesis and the likeliest
        others (``hypotheses`` in all), and each slot takes its best fill.
        """
        nbest = utterance.nbest
        tokens = nbest[top].tokens
        attempts: list[tuple[Choice | None, dict[str, Any]]] = []
        tried: set[tuple[str, str]] = set()
        for hypothesis in likeliest(nbest, top, self.settings.hypotheses):
            heard = nbest[hypothesis].tokens
            spans = sorted((map_span(tokens, heard, c.start, c.end), self.lexicon.entries[c.evidence.entry].type)
                           for c in placed)  # the entities so far, where this hypothesis holds them, to mark by type
            marked: list[str] = []
            where: list[int] = []  # marked position -> token position in the hypothesis
            at = 0
            for (start, end), entity_type in spans:
                if start < at or end <= start:
                    continue
                marked += heard[at:start] + [slot_marker(entity_type)]
                where += list(range(at, start + 1))
                at = end
            marked += heard[at:]
            where += list(range(at, len(heard)))
            for empty in self.phrases.empty_slots(marked):
                if empty.type in self.forms and (empty.type, empty.words) not in tried:
                    tried.add((empty.type, empty.words))  # the same words in another hypothesis: the same fill
                    attempts.append(self._fill(empty, hypothesis, heard, where[empty.start],
                                               where[empty.end - 1] + 1, tokens, context, nbest))
        # Each slot takes its best-aligned fill: best first, at a tie the likelier hypothesis (a
        # stable sort); a fill that overlaps one already placed is dropped.
        found: list[Choice] = []
        notes: list[dict[str, Any]] = []
        for choice, note in sorted(attempts, key=lambda a: -a[1].get("phone", 0.0)):
            if choice is not None and any(c.evidence.entry == choice.evidence.entry or c.overlaps(choice)
                                          for c in placed + found):
                note["guard"] = "overlap"
            elif choice is not None:
                found.append(choice)
            notes.append(note)
        return found, notes

    def _fill(self, empty: Unfilled, hypothesis: int, heard: list[str], start: int, end: int,
              tokens: list[str], context: ContextScorer | None,
              nbest: Sequence[Hypothesis]) -> tuple[Choice | None, dict[str, Any]]:
        """The entry that best fits one empty slot, the words ``start:end`` of hypothesis
        ``hypothesis`` (``heard``), when it clears the carrier floor and margin; and the trace record."""
        s = self.settings
        lexicon = self.lexicon
        note: dict[str, Any] = {"template": empty.template, "where": empty.where, "heard": empty.words,
                                "type": empty.type, "hypothesis": hypothesis}
        slot_words = heard[start:end]
        # The slot's words run together, one span.
        heard_as_one = [AnchoredHypothesis([self.pronouncer.words(slot_words)], [0])]
        matches = anchored_matches(heard_as_one, self.forms[empty.type], lexicon, self.costs,
                                   max_words=1, min_phone=0.0, align_floor=self.align_floor)
        if not matches:
            return None, note | {"guard": "carrier_phone"}
        match = matches[0]
        form = lexicon.forms[match.form]
        words = form.text.split()
        inside = runs_of(words, slot_words) if len(slot_words) > len(words) else []
        if inside:
            # The slot holds the form word for word and more ("{machine}" ending a line, against
            # "resin printer around noon"): the entity is those words, and the rest were said too.
            start, end = start + inside[0], start + inside[0] + len(words)
            slot_words = words
        start, end = map_span(heard, tokens, start, end)
        gain = context.gain(start, end, words) if context is not None else 0.0
        note |= {"id": lexicon.entries[form.entry].id, "form": form.text, "phone": round(match.phone, 4),
                 "runner_up": round(match.runner_up, 4), "lm_gain": round(gain, 3)}
        if match.phone < s.min_phone:
            return None, note | {"guard": "carrier_phone"}
        if sorted(slot_words) == sorted(form.text.split()) and slot_words != form.text.split():
            # The form's own words heard in another order ("a pontoon" for "pontoon a"): they
            # sound alike only because the same sounds are there; the order heard is the one said.
            return None, note | {"guard": "carrier_order"}
        if match.phone - match.runner_up < s.margin:
            return None, note | {"guard": "carrier_margin"}
        if gain < s.min_gain:
            return None, note | {"guard": "carrier_lm"}
        if s.heard_weight and match.phone < s.min_phone + s.heard_weight * heard_belief(slot_words, nbest, self.zipf):
            return None, note | {"guard": "carrier_heard"}
        if end <= start:
            return None, note | {"guard": "overlap"}
        support = {hypothesis: Sighting(match.phone, start, end, match.form, False)}
        return Choice(Evidence(form.entry, match.phone, support), match.phone, start, end, match.form,
                      False, False, gain, origin="carrier", margin=match.phone - match.runner_up), note

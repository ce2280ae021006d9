"""Where the lexicon stage loses the entity mentions it misses, one line per mention and counts per cause.

Runs a configured chain over a labelled corpus and, for every reference mention of the chosen
type (default person) that the chain did not report, follows the entry through the stage's
steps with the stage's own settings and names the first step it does not pass:

- ``say_unused``: the form the speaker said was not pronounced from the entry's `say` field
  (an alias of an entry whose `say` cannot be split by name word), noted beside the cause;
- ``not_retrieved``: no span of any hypothesis brought a form of the entry out of the phone index
  (``match.candidates`` per span, ``match.min_retrieval``);
- ``pair_floors``: retrieved, but every pair fell below ``match.align_floor``, ``match.min_phone`` or
  ``match.pair_floor``;
- ``weak``: scored, but not among the strongest entries or under ``match.pair_floor`` after pooling
  and priors, so no guard was even asked;
- a guard's name (``min_score``, ``common_words``, ``margin``, ``short_form``, ``type_hint``,
  ``exact_text_kept``, ``overlap``, ``superseded``) when the trace shows the general matcher
  blocked it, with the score it had;
- ``slot_*``/``carrier_*``: only the anchored search or the carrier phrases saw it and their guard
  stopped it (the trace names the anchored search's guards ``slot_*``).

Beside the cause each line gives the best phone similarity any span of the N-best reaches with
the said form ("reach", the most any threshold could allow), that span, the index's Dice score
and rank of the form for it (how far down ``candidates`` would have to go), and any other entry
of the type reported instead.

    python benchmarks/person_misses.py examples/workshop/corpus.jsonl \
        --config examples/workshop/relay.yaml --where 'snr_db!=15'
"""

from __future__ import annotations

import argparse
import sys
from collections import Counter
from pathlib import Path
from typing import Any

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from benchmarks.corpus_chain import add_corpus_arguments, items_and_chain
from stages.lexicon.anchored import AnchoredForms, AnchoredHypothesis, anchor_positions, anchored_matches
from stages.lexicon.match import find_spans, score_spans
from stages.lexicon.sound.phonetics import batch_similarity
from stages.lexicon.stage import LexiconStage
from stages.normalize.tokens import tokenize


def _lexicon_stage(chain: Any) -> LexiconStage:
    for stage in chain.stages:
        if isinstance(stage, LexiconStage):
            return stage
    raise SystemExit("the chain has no lexicon stage")


def _followed(entity_id: str, entity_type: str) -> bool:
    """Whether a mention of ``entity_id`` is followed with ``--type entity_type`` ("all": every one)."""
    return entity_type == "all" or entity_id.startswith(entity_type + ".")


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    add_corpus_arguments(parser)
    parser.add_argument("--type", default="person", help="entity type to follow (default person; all: every type)")
    parser.add_argument("--quiet", action="store_true", help="counts only, no line per mention")
    args = parser.parse_args(argv)
    items, chain = items_and_chain(args)
    stage = _lexicon_stage(chain)
    settings = stage.settings
    lexicon = stage._lexicon
    search, anchored = stage.general, stage.anchored
    assert search is not None  # the chain is loaded
    by_id = {entry.id: number for number, entry in enumerate(lexicon.entries)}
    forms_of: dict[int, list[int]] = {}
    for number, form in enumerate(lexicon.forms):
        forms_of.setdefault(form.entry, []).append(number)

    causes: Counter[str] = Counter()
    reach: Counter[str] = Counter()
    anchored_causes: Counter[str] = Counter()
    pronouncer = stage.pronouncer
    say_unused = 0
    mentions = found_count = 0
    for item in items:
        utterance = chain.process(item.utterance())
        reported = {e.id for e in utterance.entities}
        trace = next((t.scores for t in utterance.trace if t.stage == stage.name), {})
        for entity_id, text in item.entity_texts:
            if not _followed(entity_id, args.type):
                continue
            mentions += 1
            if entity_id in reported:
                found_count += 1
                continue
            entry = by_id[entity_id]
            record = lexicon.entries[entry]
            said = " ".join(tokenize(text))
            said_forms = [f for f in forms_of[entry] if lexicon.forms[f].text == said] or forms_of[entry]
            # The respelling matters only where it differs from what the spelling alone gives.
            name_words = tokenize(record.name)
            unused = bool(record.say) and pronouncer.form(
                " ".join(name_words), name=record.name, say=record.say) != pronouncer.words(name_words) and any(
                lexicon.forms[f].phones == pronouncer.words(lexicon.forms[f].text.split()) for f in said_forms)
            say_unused += unused

            nbest = utterance.nbest
            spans = find_spans(nbest, settings.max_span_words or lexicon.max_words + 1, stage.pronouncer)
            # The most any threshold could allow: the best phone similarity of any span and the said form.
            queries = [q for q in range(len(spans)) for _ in said_forms]
            targets = [lexicon.forms[f].phones for _ in range(len(spans)) for f in said_forms]
            similarity = batch_similarity([spans.phones[q] for q in queries], targets, stage.costs)
            top = int(similarity.argmax())
            best_span, best_form, best_phone = queries[top], said_forms[top % len(said_forms)], float(similarity[top])
            wide = lexicon.index.search([spans.phones[best_span]], k=len(lexicon.forms), min_score=0.0)
            ranked = wide.item.tolist()
            rank = next((i + 1 for i, f in enumerate(ranked) if lexicon.forms[f].entry == entry), None)
            dice = float(wide.score[rank - 1]) if rank is not None else 0.0

            hits = lexicon.index.search(spans.phones, k=settings.match.candidates, min_score=settings.match.min_retrieval)
            retrieved = any(lexicon.forms[f].entry == entry for f in hits.item.tolist())
            pairs = score_spans(spans, lexicon, search.weights, stage.costs)
            paired = [p for p in pairs if lexicon.forms[p[1]].entry == entry]
            blocked = [b for b in trace.get("blocked", []) if b["id"] == entity_id]
            general = [b for b in blocked if not b["guard"].startswith(("slot_", "carrier_"))]
            after_hint = [b for b in blocked if b["guard"].startswith("slot_")]  # the anchored search's guards
            # One record per carrier slot tried; the one that named this entry and was refused.
            carrier = next((c for c in trace.get("carrier") or [] if c.get("id") == entity_id and "guard" in c), {})
            if general:
                worst = max(general, key=lambda b: b["score"])
                cause, detail = worst["guard"], f"score {worst['score']:.3f} heard {worst['heard']!r}"
            elif after_hint:
                worst = max(after_hint, key=lambda b: b["score"])
                cause, detail = worst["guard"], f"phone {worst['score']:.3f} heard {worst['heard']!r} lm {worst['lm_gain']}"
            elif carrier:
                cause, detail = carrier["guard"], f"phone {carrier.get('phone')} heard {carrier.get('heard')}"
            elif not retrieved:
                cause, detail = "not_retrieved", ""
            elif not paired:
                cause, detail = "pair_floors", ""
            else:
                strongest = max(p[2] for p in paired)
                cause, detail = "weak", f"best pair {strongest:.3f}"
            anchored_note = ""
            if cause in ("not_retrieved", "pair_floors", "weak") and anchored and record.type in anchored.forms:
                # The anchored search's second chance: the entry's best phone similarity after an anchor.
                hints = anchored.hints[record.type]
                order = sorted(range(len(nbest)), key=lambda h: (h != nbest.index(utterance.best), -nbest[h].posterior))
                searched = [AnchoredHypothesis([stage.pronouncer.word(t) for t in nbest[h].tokens],
                                           anchor_positions(nbest[h].tokens, hints, at_start=settings.anchored.at_start))
                            for h in order[: settings.anchored.hypotheses]]
                floor = settings.anchored.floors.get(record.type, settings.anchored.min_phone)
                # Aligned with this entry's searched forms alone and no screen: what it could reach there.
                own = tuple(f for f in anchored.forms[record.type].forms if lexicon.forms[f].entry == entry)
                alone = AnchoredForms(record.type, own, tuple(lexicon.forms[f].phones for f in own))
                mine = anchored_matches(searched, alone, lexicon, stage.costs, max_words=settings.anchored.max_words,
                                    min_phone=0.0, align_floor=0.0)
                if not any(h.anchors for h in searched):
                    anchored_note, anchored_cause = "anchored: no anchor", "no_anchor"
                elif not mine:
                    anchored_note, anchored_cause = "anchored: no form searched for (too short)", "no_form"
                else:
                    top_match = max(mine, key=lambda m: m.phone)
                    anchored_cause = "under_floor" if top_match.phone < floor else "over_floor"
                    anchored_note = (f"anchored: best {top_match.phone:.3f} (floor {floor}) on "
                                 f"{' '.join(nbest[order[top_match.hypothesis]].tokens[top_match.start:top_match.end])!r}")
                anchored_causes[anchored_cause] += 1
            causes[cause] += 1
            band = "<0.60" if best_phone < 0.6 else "0.60-0.70" if best_phone < 0.7 else ">=0.70"
            reach[band] += 1
            instead = sorted(i for i in reported - item.entity_ids if _followed(i, args.type))
            if not args.quiet:
                print(f"{item.id} {said!r:24s} {cause:15s} {detail}")
                print(f"    first {nbest[0].text!r}; reach {best_phone:.3f} on {spans.texts[best_span]!r}"
                      f" ({lexicon.forms[best_form].text}), dice {dice:.2f} rank {rank}"
                      f"{'; say unused' if unused else ''}{'; instead ' + ', '.join(instead) if instead else ''}")
                if anchored_note:
                    print(f"    {anchored_note}")
    print(f"{args.type}: {found_count}/{mentions} mentions found, {mentions - found_count} missed")
    print("missed by cause: " + ", ".join(f"{cause} {count}" for cause, count in causes.most_common()))
    print("best phone similarity reachable in the N-best: " + ", ".join(
        f"{band} {reach[band]}" for band in ("<0.60", "0.60-0.70", ">=0.70")))
    print("of those the general search never weighed, the anchored search: " + ", ".join(
        f"{cause} {count}" for cause, count in anchored_causes.most_common()))
    print(f"said form not pronounced from its say field: {say_unused}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

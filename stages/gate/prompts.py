"""What the gate says back when it does not accept: a question about the entity in doubt, or a
request to say it again."""

from __future__ import annotations

from typing import Any

from relay.core.utterance import Decision, Utterance
from stages.gate.features import GateFeatures
from stages.gate.settings import GateSettings

__all__ = ["prompt_for"]


def prompt_for(utterance: Utterance, decision: Decision, rule: str, features: GateFeatures,
               settings: GateSettings) -> str | None:
    """The prompt for a decision made by ``rule``; None for an accept."""
    if decision == "accept":
        return None
    about = None
    if rule in {"weak_entity", "entity"} and utterance.entities:
        about = min(utterance.entities, key=lambda e: e.score)
    elif rule in {"correction", "confidence"} and utterance.entities and utterance.corrections:
        # Unsure after a correction: the question is about what was corrected.
        corrected = {c.after for c in utterance.corrections}
        about = next((e for e in utterance.entities if e.name in corrected), None)
        about = about or min(utterance.entities, key=lambda e: e.score)
    # Asking again with a slot that only everyday words filled, or one the nearest in-domain line
    # holds and no entity fills: ask for that slot ("Which room?").
    missing = (features.unfilled_type or features.missing_type) if decision == "reprompt" and about is None else None
    entity_type = about.type if about is not None else missing
    prompts = settings.prompts
    if entity_type is not None and entity_type in settings.prompts_by_type:
        prompts = settings.prompts_by_type[entity_type]
    if rule.startswith("safety:"):
        template = prompts.confirm_safety
    elif decision == "confirm":
        template = prompts.confirm_entity if about is not None else prompts.confirm
    else:
        template = prompts.reprompt_entity if entity_type is not None else prompts.reprompt
    values: dict[str, Any] = {
        "text": utterance.text,
        "entity": about.name if about else "",
        "heard": about.heard if about else "",
        "type_noun": settings.type_nouns.get(entity_type, entity_type.replace("_", " ")) if entity_type else "",
    }
    return template.format(**values)

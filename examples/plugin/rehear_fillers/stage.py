"""Stage `strip_fillers`: drop hesitation words from every hypothesis before rescoring.

Recognisers write what they hear: "book the uh lathe", "um open bay two". The NLU's training
text has no hesitations, so they cost the language model and split phrases the lexicon would
otherwise match. The stage removes the listed words from each hypothesis's tokens and text;
hypotheses that become identical are merged the way `normalize` merges them, by summing
their probability.
"""

from __future__ import annotations

from typing import ClassVar

from pydantic import BaseModel, ConfigDict, Field

from relay.core.stage import StageContext
from relay.core.utterance import Hypothesis, Utterance


class StripFillersSettings(BaseModel):
    model_config = ConfigDict(extra="forbid")  # an unknown key is a config error naming its line

    words: list[str] = Field(default_factory=lambda: ["um", "uh", "er", "erm", "hmm"],
                             description="hesitation words to drop (lower case, as tokenised)")


class StripFillersStage:
    """Drops hesitation words; merges hypotheses that then read the same."""

    name: ClassVar[str] = "strip_fillers"
    Settings: ClassVar[type[BaseModel]] = StripFillersSettings
    needs: ClassVar[frozenset[str]] = frozenset({"tokens", "posterior"})
    provides: ClassVar[frozenset[str]] = frozenset({"tokens", "posterior"})

    def __init__(self, settings: StripFillersSettings, *, context: StageContext) -> None:
        self.settings = settings
        self.fillers = frozenset(settings.words)

    def load(self) -> None:
        pass  # nothing to read: the word list is in the settings

    def process(self, utterance: Utterance) -> Utterance:
        kept: dict[tuple[str, ...], Hypothesis] = {}
        dropped = 0
        for hypothesis in utterance.nbest:
            tokens = [t for t in hypothesis.tokens if t not in self.fillers]
            dropped += len(hypothesis.tokens) - len(tokens)
            same = kept.get(tuple(tokens))
            if same is not None:
                same.posterior += hypothesis.posterior
                same.merged += hypothesis.merged
                continue
            hypothesis.tokens = tokens
            hypothesis.text = " ".join(tokens)
            kept[tuple(tokens)] = hypothesis
        utterance.nbest = list(kept.values())
        utterance.note(dropped=dropped, merged=len(kept))
        return utterance

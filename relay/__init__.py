"""rehear: a relay that cleans a speech recogniser's N-best lists before they reach NLU."""

from relay.core.chain import Chain
from relay.core.errors import ConfigError, InputError, RehearError, StageError, TransportError
from relay.core.registry import Registry
from relay.core.stage import Stage, StageContext
from relay.core.utterance import Hypothesis, Utterance

__version__ = "0.1.0"

__all__ = [
    "Chain",
    "ConfigError",
    "Hypothesis",
    "InputError",
    "Registry",
    "RehearError",
    "Stage",
    "StageContext",
    "StageError",
    "TransportError",
    "Utterance",
    "__version__",
]

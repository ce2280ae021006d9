"""rehear: a relay that cleans a speech recogniser's N-best lists before they reach NLU."""

from relay.errors import ConfigError, InputError, RehearError, StageError, TransportError
from relay.pipeline import Chain, Hypothesis, Stage, StageContext, Utterance
from relay.registry import Registry

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

"""The default chain, normalize -> lm_rescore -> lexicon -> gate, built in memory from a lexicon,
in-domain text and (optionally) speaker affinities, for `eval` and `tune` without a config file.

The result is an ordinary configuration dict, so `tune` can write it back out as YAML that
`run` and `eval` accept. A stage that cannot be imported is left out with a note on stderr,
so the zero-config form keeps working while stages are missing.
"""

from __future__ import annotations

import hashlib
import sys
from pathlib import Path
from typing import Any

from relay.core.chain import Chain
from relay.core.config import build_chain
from relay.core.errors import ConfigError
from relay.core.registry import Registry
from relay.workbench.build_lm import build_model
from relay.workbench.variants import config_from_dict

__all__ = ["default_config", "folder_config", "load_chain"]

def _available(registry: Registry, name: str) -> bool:
    try:
        registry.get(name)
    except ConfigError:
        return False
    return True


def _build_language_model(train: Path, lexicon: Path, cache_dir: Path) -> Path:
    """Estimate the ARPA model from ``train`` (slots expanded from ``lexicon``), cached by content."""
    digest = hashlib.sha256(train.read_bytes() + b"\0" + lexicon.read_bytes()).hexdigest()[:16]
    output = cache_dir / f"default-lm-{digest}.arpa"
    if not output.exists():
        cache_dir.mkdir(parents=True, exist_ok=True)
        build_model(train=train, lexicon=lexicon, output=output)  # written atomically
    return output


def _note(message: str) -> None:
    print(f"rehear: {message}", file=sys.stderr)


def default_config(*, lexicon: Path, train: Path | None, speakers: Path | None,
                   cache_dir: Path = Path(".rehear-cache"), registry: Registry | None = None) -> dict[str, Any]:
    """A relay configuration dict holding the default chain for these files (absolute paths).

    The files go into the ``domain:`` section once; every stage reads them from there: the
    language model built from ``train`` (rescoring, the lexicon's context term, the gate's view
    of the finished text), ``train`` itself as carrier phrases, the lexicon and the speakers.
    """
    registry = registry or Registry()
    for label, path in (("lexicon", lexicon), ("in-domain text", train), ("speakers", speakers)):
        if path is not None and not path.is_file():
            raise ConfigError(f"Cannot build the default chain: {label} file {path} does not exist")
    domain: dict[str, str] = {"lexicon": str(lexicon.resolve())}
    if speakers is not None:
        domain["speakers"] = str(speakers.resolve())
    stages: list[Any] = ["normalize"]
    if train is not None:
        domain["text"] = str(train.resolve())
        domain["language_model"] = str(_build_language_model(train.resolve(), lexicon.resolve(), cache_dir.resolve()))
        if _available(registry, "lm_rescore"):
            stages.append("lm_rescore")
        else:
            _note("stage lm_rescore is not installed; the default chain runs without it")
    if _available(registry, "lexicon"):
        # Hints, anchors and the types searched after them come from the in-domain text (the
        # lexicon stage reads them off the words before each slot), so nothing here is tied to
        # one trade's phrasing.
        stages.append("lexicon")
    else:
        _note("stage lexicon is not installed; the default chain runs without it")
    stages.append("gate")
    return {"domain": domain, "cache_dir": str(cache_dir.resolve()), "stages": stages}


def folder_config(folder: Path, *, cache_dir: Path) -> dict[str, Any]:
    """The default chain for a folder laid out as the examples are: ``lexicon.csv``,
    ``train.txt`` and, when there is one, ``speakers.csv``."""
    speakers = folder / "speakers.csv"
    return default_config(lexicon=folder / "lexicon.csv", train=folder / "train.txt",
                          speakers=speakers if speakers.exists() else None, cache_dir=cache_dir)


def load_chain(raw: dict[str, Any], *, base_dir: Path) -> Chain:
    """The chain a configuration dict describes, built and loaded."""
    chain = build_chain(config_from_dict(raw, base_dir=base_dir))
    chain.load()
    return chain

"""A first configuration for a team's own domain: the default chain over their lexicon and
in-domain text, every section commented, paths relative to the written file, the language
model built beside it. `rehear check` accepts it and `rehear run` runs it as written."""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

from relay.core.config import build_chain, load_config
from relay.workbench.build_lm import build_model
from relay.workbench.written import write_atomically
from stages.lexicon.data import read_lexicon

__all__ = ["StarterFiles", "starter_text", "write_starter"]


@dataclass(frozen=True, slots=True)
class StarterFiles:
    """The files a starter configuration names, as the user gave them."""

    output: Path
    lexicon: Path
    text: Path
    language_model: Path
    speakers: Path | None = None


def _relative(path: Path, to: Path) -> str:
    return os.path.relpath(path.resolve(), to.resolve().parent)


def starter_text(files: StarterFiles, *, entries: int, types: list[str]) -> str:
    """The commented configuration."""
    out = files.output
    speakers = (f"  speakers: {_relative(files.speakers, out)}         # speaker,id,affinity: who uses which entries\n"
                if files.speakers else
                "  # speakers: speakers.csv    # speaker,id,affinity: who uses which entries (optional)\n")
    return f"""\
# rehear relay configuration, written by `rehear starter` for a lexicon of {entries} entries
# ({", ".join(types)}). Check it with `rehear check {out.name}`, run it with `rehear run {out.name}`.
# Paths are relative to this file. `rehear stages` lists every stage setting with its default.

broker:                         # the MQTT broker the recogniser publishes to
  host: ${{MQTT_HOST:-127.0.0.1}}
  port: ${{MQTT_PORT:-1883}}
  protocol: 5                   # 3.1.1 for older brokers
  client_id: rehear
  username: ${{MQTT_USERNAME:-}}
  # password: ${{MQTT_PASSWORD}}  # read from the environment, never written here
  session_expiry_s: 3600        # input queued while the relay restarts is delivered afterwards

topics:
  inputs: ["asr/+/nbest"]       # the recogniser's N-best lists; the + level names the device
  output: "nlu/{{source}}/in"     # cleaned results, to the NLU service
  prompt: "dialogue/{{source}}/prompt"   # what to say back when the gate asks
  dead_letter: "rehear/dead-letter"    # messages that cannot be read, unchanged, with the reason

limits:
  deadline_ms: 250              # past this the original goes on, flagged, rather than stall the dialogue
  max_in_flight: 32             # the in-flight alert in deploy/prometheus reads this value from /metrics

metrics:
  host: 127.0.0.1               # /metrics and /healthz; 0.0.0.0 only inside a container or pod
  port: 9464

logging:
  format: plain                 # json for a log collector
  level: info

capture:                        # record what arrives and what goes out, for `rehear label`
  enabled: false                # turn on for a few days of real use, then label what it caught
  directory: capture            # rotating JSON Lines files, at most max_files x max_file_bytes
  max_file_bytes: 8388608
  max_files: 8

domain:                         # your files, each named once; every stage reads them from here
  lexicon: {_relative(files.lexicon, out)}          # names, aliases and how they sound (docs/formats.md section 3)
  text: {_relative(files.text, out)}             # the NLU's training lines with {{type}} slots (section 4)
  language_model: {_relative(files.language_model, out)}   # built from text by `rehear build-lm` (the starter did)
{speakers}
# The default chain. Its settings are the defaults until `rehear tune` fits them to a labelled
# corpus of your recogniser's output (`rehear label` makes one from captured or logged messages).
stages:
  - normalize                   # one tokenisation, identical hypotheses merged, initial posterior
  - lm_rescore                  # the in-domain language model re-ranks the N-best list
  - lexicon                     # misheard domain terms corrected by how they sound
  - gate                        # accept, confirm or ask again: rehear's shipped confidence until tune fits yours
  # - gate: {{asr_gives_conf: false}}   # in its place if your recogniser never sends a `conf`: then a message
  #                                   # without one is not read as doubt (`rehear eval` tells you)
"""


def write_starter(files: StarterFiles, *, build_lm: bool = True) -> tuple[int, list[str]]:
    """Build the language model (unless it exists and ``build_lm`` is false), write the
    configuration and check that it builds; (entries, types) of the lexicon."""
    entries = read_lexicon(files.lexicon)  # a bad lexicon stops here, naming its line
    types = sorted({entry.type for entry in entries})
    if build_lm or not files.language_model.is_file():
        build_model(train=files.text, output=files.language_model, lexicon=files.lexicon)
    text = starter_text(files, entries=len(entries), types=types)
    write_atomically(files.output, text.encode("utf-8"))
    build_chain(load_config(files.output))  # what `rehear check --no-load` does: refuses what it would refuse
    return len(entries), types

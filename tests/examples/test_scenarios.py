"""Every example scenario's files read as the formats say, and its corpora label only entries of
its own lexicon: the held-out glasshouse as much as the two the defaults were chosen on."""

from __future__ import annotations

from pathlib import Path

import pytest

from examples.recording.scenario import load_scenario, load_settings
from relay.workbench.corpus import read_corpus
from stages.indomain.text import is_marker, read_templates
from stages.lexicon.data import read_lexicon

ROOT = Path(__file__).resolve().parents[2]
SCENARIOS = ("workshop", "boatyard", "glasshouse")


@pytest.mark.parametrize("name", SCENARIOS)
def test_the_scenario_reads_and_its_corpora_name_only_its_entries(name: str) -> None:
    folder = ROOT / "examples" / name
    settings = load_settings(folder)
    load_scenario(folder)
    entries = {e.id: e for e in read_lexicon(folder / "lexicon.csv")}
    types = {e.type for e in entries.values()}
    slots = {t[1:-1] for _, tokens in read_templates(folder / "train.txt") for t in tokens if is_marker(t)}
    assert slots <= types, f"{name}: train.txt slots {sorted(slots - types)} are no lexicon type"
    for part in settings.parts.values():
        for output in part.outputs.values():
            items = read_corpus(folder / output.file)
            assert len(items) == part.count, f"{name}/{output.file}"
            labelled = {i for item in items for i in item.entity_ids}
            assert labelled <= set(entries), f"{name}/{output.file}: {sorted(labelled - set(entries))[:5]}"

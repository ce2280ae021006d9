"""Shared by the corpus benchmarks: the corpus, --config and --where arguments, and the loaded chain."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from relay.core.chain import Chain
from relay.core.config import build_chain, load_config
from relay.workbench.corpus import CorpusItem, parse_filter, read_corpus


def add_corpus_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("corpus", type=Path, help="labelled corpus (JSONL, FORMATS section 5)")
    parser.add_argument("--config", type=Path, required=True, help="relay configuration whose chain is measured")
    parser.add_argument("--where", action="append", default=[], metavar="TAG=VALUE|TAG!=VALUE",
                        help="keep only utterances whose tags match (repeatable), e.g. snr_db!=15")


def items_and_chain(args: argparse.Namespace) -> tuple[list[CorpusItem], Chain]:
    """The corpus lines the --where filters keep, and the configured chain, loaded."""
    filters = [parse_filter(text) for text in args.where]
    items = [item for item in read_corpus(args.corpus) if all(f(item) for f in filters)]
    chain = build_chain(load_config(args.config))
    chain.load()
    return items, chain

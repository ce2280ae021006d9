"""Options shared by the commands that read a labelled corpus (`eval`, `tune`)."""

from __future__ import annotations

import argparse
from collections.abc import Iterable
from pathlib import Path

from relay.core.chain import Chain
from relay.core.config import LoadedConfig, build_chain, load_config
from relay.core.errors import ConfigError
from relay.core.stage import files_used
from relay.workbench.corpus import CorpusItem, TagFilter, check_entity_ids, parse_filter, read_corpus
from relay.workbench.defaults import default_config
from relay.workbench.variants import config_from_dict
from stages.lexicon.data import read_lexicon

__all__ = ["add_corpus_arguments", "chain_lexicon", "chosen_config", "selected_items", "tag_filter"]


def tag_filter(text: str) -> TagFilter:
    """argparse type for a TAG=V or TAG!=V corpus filter."""
    try:
        return parse_filter(text)
    except ValueError as exc:
        raise argparse.ArgumentTypeError(str(exc)) from None


def _exclusion(text: str) -> TagFilter:
    found = tag_filter(text)
    if not found.keep:
        raise argparse.ArgumentTypeError(f"{text!r}: --exclude-tag takes TAG=VALUE")
    return TagFilter(tag=found.tag, keep=False, values=found.values)


def add_corpus_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("corpus", type=Path, metavar="CORPUS", help="labelled corpus, JSON Lines (docs/formats.md section 5)")
    chain = parser.add_argument_group("the chain (either --config, or --lexicon with --train for the default chain)")
    chain.add_argument("--config", type=Path, help="relay configuration YAML; its stages: list is the chain")
    chain.add_argument("--lexicon", type=Path, help="lexicon CSV/YAML/JSON; builds normalize -> lm_rescore -> lexicon -> gate")
    chain.add_argument("--train", type=Path, help="in-domain text for the language model of the default chain")
    chain.add_argument("--speakers", type=Path, help="speaker affinities CSV for the default chain")
    part = parser.add_argument_group("which part of the corpus (tags of each line; null matches a missing tag)")
    part.add_argument("--where", type=tag_filter, action="append", default=[], metavar="TAG=V|TAG!=V",
                      help="keep lines whose tag matches, e.g. snr_db!=15 or split=novel; values may be "
                      "comma-separated (snr_db=null,25); repeat to require several")
    part.add_argument("--exclude-tag", type=_exclusion, action="append", default=[], metavar="TAG=V",
                      help="leave out lines with this tag value, e.g. snr_db=15 (same as --where snr_db!=15)")
    parser.add_argument("--no-progress", action="store_true",
                        help="no progress bar (there is none anyway when stderr is not a terminal)")


def selected_items(args: argparse.Namespace, loaded: LoadedConfig, *,
                   chain: Chain | None = None) -> tuple[list[CorpusItem], str]:
    """The corpus lines the filters keep, and a description of the filters.

    ``chain``: the chain built from ``loaded`` when the caller has one (its stages name the
    lexicon the entity ids are checked against); otherwise one is constructed here, not loaded.
    """
    items = read_corpus(args.corpus, field_map=loaded.config.fields)
    filters: list[TagFilter] = [*args.where, *args.exclude_tag]
    kept = [item for item in items if all(f(item) for f in filters)]
    described = " and ".join(str(f) for f in filters) or "all lines"
    if not kept:
        raise ConfigError(f"No corpus line of {args.corpus} matches {described}")
    stages = (chain if chain is not None else build_chain(loaded)).stages
    lexicon = chain_lexicon(stages, loaded.domain.lexicon)
    if lexicon is not None and lexicon.is_file():
        check_entity_ids(kept, {entry.id for entry in read_lexicon(lexicon)}, lexicon)
    return kept, described


def chain_lexicon(stages: Iterable[object], domain_lexicon: Path | None) -> Path | None:
    """The lexicon the chain's stages match against, else the configuration's domain lexicon."""
    for stage in stages:
        path = files_used(stage).get("lexicon")
        if path is not None:
            return path
    return domain_lexicon


def chosen_config(args: argparse.Namespace) -> LoadedConfig:
    """The configuration named by --config, or the default chain built from --lexicon/--train."""
    if args.config is not None and args.lexicon is not None:
        raise ConfigError("Give either --config or --lexicon (with --train), not both")
    if args.config is not None:
        return load_config(args.config)
    if args.lexicon is None:
        raise ConfigError("Which chain? Give --config FILE, or --lexicon FILE --train FILE for the default chain")
    raw = default_config(lexicon=args.lexicon, train=args.train, speakers=args.speakers)
    return config_from_dict(raw, base_dir=Path.cwd(), label="<default chain>")


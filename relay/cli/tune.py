"""`rehear tune CORPUS -o tuned.yaml`: choose stage parameters and gate thresholds by k-fold
cross-validation and write a configuration `run` and `eval` accept."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Any

import orjson
import yaml
from ruamel.yaml.comments import CommentedMap
from tqdm import tqdm

from relay.cli.common import delegate, output_file, show_progress
from relay.cli.corpus_args import add_corpus_arguments, chosen_config, selected_items
from relay.core.errors import ConfigError
from relay.core.yamlsource import load_yaml
from relay.workbench.evaluate import Summary, format_table
from relay.workbench.tune import tune
from relay.workbench.written import dump_yaml, load_commented, merge_in_place, rebase_paths, write_atomically

__all__ = ["add_parser", "run"]

DESCRIPTION = """\
Tune the chain on a labelled corpus: language-model weights, lexicon thresholds and the gate
are chosen to make the fewest wrong accepts while asking back from doubt at most --max-clarify
of the utterances (then the fewest slot errors - entities missed, wrong or put in - then the
lowest WER); what the safety rule asks back is policy and comes on top. Expensive stages run
once per parameter setting; the gate is fitted on the recorded scores two ways - its hand
thresholds swept, and a learned confidence (logistic regression on all the gate's features,
including how the in-domain LM judges the finished text) with its threshold swept - and the
better one on the training utterances is kept. Numbers printed are held-out only: each fold is
scored with the choice, model included, fitted on the other folds. The written configuration is
fitted on the whole (filtered) corpus. When more than 5% of the accepted results are still wrong
held out, it warns (the budget is too small for this recogniser's output) and shows the held-out
numbers at larger budgets, refitting only the gate.

The search space names stage parameters through the configuration, a group's by dotted
name, e.g. a YAML file
    lm_rescore: {lm_weight: [0.3, 0.6, 1.0]}
    lexicon: {general.min_score: [0.5, 0.7], context.loss_weight: [0.03, 0.06]}
Parameters of stages the chain lacks, or that the installed stage does not have, are skipped.
"""


def _share(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        value = -1.0
    if not 0.0 <= value <= 1.0:
        raise argparse.ArgumentTypeError(f"{text!r}: give a share between 0 and 1, e.g. 0.25")
    return value


def _configure(parser: argparse.ArgumentParser) -> argparse.ArgumentParser:
    add_corpus_arguments(parser)
    parser.add_argument("-o", "--output", type=output_file, required=True, metavar="TUNED.yaml",
                        help="configuration to write: the input configuration with its comments, the tuned "
                        "values in place, file paths relative to this file")
    parser.add_argument("--max-clarify", type=_share, default=0.25, metavar="SHARE",
                        help="most utterances the gate may ask back from doubt, confirm + reprompt, not counting "
                        "the safety rule's (default %(default)s)")
    parser.add_argument("--json", type=output_file, metavar="OUT",
                        help="also write the held-out numbers (pooled and per fold) as JSON")
    parser.add_argument("--folds", type=int, default=5, help="cross-validation folds (default %(default)s)")
    parser.add_argument("--seed", type=int, default=20261202, help="seed for folds and sampling (default %(default)s)")
    parser.add_argument("--repeats", type=int, default=1,
                        help="run the cross-validation this many times on different random splits and pool "
                        "the held-out numbers: steadier numbers for a small corpus, each repeat costing the "
                        "fits again but not the stage runs (default %(default)s)")
    parser.add_argument("--space", type=Path, metavar="SPACE.yaml",
                        help="stage -> parameter -> list of values to try (default: a built-in space)")
    parser.add_argument("--max-settings", type=int, default=24,
                        help="most stage-parameter settings to run; a seeded sample if the space is larger "
                        "(default %(default)s)")
    return parser


def add_parser(subparsers: Any) -> argparse.ArgumentParser:
    parser = subparsers.add_parser("tune", help="choose thresholds and weights on a labelled corpus",
                                   description=DESCRIPTION, formatter_class=argparse.RawDescriptionHelpFormatter)
    return _configure(parser)


# Held-out wrong accepts above this share of the accepted results draw a warning: the share
# rehear's own defaults are held to on the example scenarios (README, 'Targets').
WARN_WRONG_ACCEPTS = 0.05


def wrong_accepts_warning(held_out: Summary, max_clarify: float) -> str | None:
    """What to tell a user whose tuned gate still accepts wrong results too often held out."""
    if held_out.accepted == 0 or held_out.wrong_accept_rate <= WARN_WRONG_ACCEPTS:
        return None
    return (f"rehear tune: warning: held out, {held_out.wrong_accept_rate:.1%} of the accepted results were wrong "
            f"({held_out.wrong_accepts} of {held_out.accepted}), over {WARN_WRONG_ACCEPTS:.0%}. Asking back at most "
            f"{max_clarify:.0%} from doubt (--max-clarify), no setting tried did better on this corpus. Raise "
            "--max-clarify to ask back more, or give the relay better recogniser output, before acting on accepts.")


# Doubt budgets the warning looks at, above the one given: what asking back more would have bought.
LARGER_BUDGETS = (0.4, 0.5, 0.6, 0.7, 0.8)


def budget_lines(curve: list[tuple[float, Summary]]) -> str:
    """The held-out wrong accepts at larger budgets, and the smallest that keeps them within
    WARN_WRONG_ACCEPTS, for the warning."""
    lines = [f"  --max-clarify {budget:.1f}: wrong accepts {s.wrong_accept_rate:.1%} ({s.wrong_accepts} of "
             f"{s.accepted} accepted), asked back from doubt {s.asked_doubt:.1%}" for budget, s in curve]
    enough = [budget for budget, s in curve if s.accepted and s.wrong_accept_rate <= WARN_WRONG_ACCEPTS]
    lines.append(f"  the smallest of these within {WARN_WRONG_ACCEPTS:.0%}: --max-clarify {enough[0]:.1f}" if enough
                 else f"  none of these keeps wrong accepts within {WARN_WRONG_ACCEPTS:.0%}")
    return "held out (the first split), had tune asked back more:\n" + "\n".join(lines)


def run(args: argparse.Namespace) -> int:
    loaded = chosen_config(args)
    items, described = selected_items(args, loaded)
    space = None
    if args.space is not None:
        space = load_yaml(args.space).value
        if not isinstance(space, dict) or not all(isinstance(v, dict) for v in space.values()):
            raise ConfigError(f"Invalid search space {args.space}", ["write stage: {parameter: [values, ...]}"])
    # The configuration as the user wrote it: ${VARIABLES} stay unexpanded, so no secret from
    # the environment ends up in the tuned file. The file was read once, by chosen_config.
    text = loaded.source.text if args.config else None
    document = load_commented(args.config, text=text) if text is not None else None
    written = yaml.safe_load(text) if text is not None else dict(loaded.source.value)
    try:
        result = tune(loaded, items, written=written, space=space, max_clarify=args.max_clarify, folds=args.folds,
                      seed=args.seed, max_settings=args.max_settings, repeats=args.repeats,
                      progress=show_progress(args))
    except ValueError as exc:
        raise ConfigError(str(exc)) from None
    space_text = ", ".join(f"{s}.{p}" for s in result.space for p in result.space[s]) or "none"
    print(f"{len(result.settings)} stage setting(s) tried over {space_text}")
    for fold in result.folds:
        s = fold.score
        split = f"split {fold.fold // args.folds + 1}/{args.repeats}, " if args.repeats > 1 else ""
        print(f"{split}fold {fold.fold % args.folds + 1}/{args.folds} (held out {len(fold.test)}): WER {s.wer_relay:.1%} "
              f"(first {s.wer_first:.1%}), wrong accepts {s.wrong_accept_rate:.1%}, asked back {s.clarify_rate:.1%}")
    held_out = result.held_out
    splits = f" x {args.repeats} splits" if args.repeats > 1 else ""
    print(format_table(held_out, title=f"held-out folds pooled{splits}, {args.corpus} ({described}):"))
    warning = wrong_accepts_warning(held_out, args.max_clarify)
    if warning is not None:
        print(warning, file=sys.stderr)
        budgets = [b for b in LARGER_BUDGETS if b > args.max_clarify + 1e-9]
        if budgets:
            curve = [(b, result.at_budget(b)) for b in tqdm(budgets, desc="larger budgets", unit="budget",
                                                             disable=not show_progress(args))]
            print(budget_lines(curve), file=sys.stderr)
    header = (f"# rehear tune on {args.corpus} ({described}), {args.folds}-fold{splits} held-out: "
              f"WER {held_out.wer_relay:.1%}, wrong accepts {held_out.wrong_accept_rate:.1%}, "
              f"asked back {held_out.clarify_rate:.1%}, {held_out.asked_doubt:.1%} from doubt "
              f"(budget {args.max_clarify:.0%})\n")
    if document is None:
        document = result.config
    else:
        _set_stages(document, result.stages)
    rebase_paths(document, base_dir=loaded.base_dir, out_dir=args.output.parent, absolute=args.config is None)
    write_atomically(args.output, dump_yaml(document, header=header).encode("utf-8"))
    if args.json is not None:
        numbers = {"held_out": held_out.to_json(), "folds": [fold.score.to_json() for fold in result.folds],
                   "max_clarify": args.max_clarify, "settings_tried": len(result.settings), "repeats": args.repeats}
        write_atomically(args.json, orjson.dumps(numbers, option=orjson.OPT_INDENT_2) + b"\n")
    print(f"wrote {args.output}")
    return 0


def _set_stages(document: Any, stages: list[Any]) -> None:
    """The tuned ``stages:`` list written into the round-trip tree, comments kept."""
    if not isinstance(document, dict):
        raise ConfigError("the configuration's top level must be a mapping")
    if not isinstance(document.get("stages"), list):
        document["stages"] = stages
        return
    written = document["stages"]
    for index, item in enumerate(stages):
        name, params = (item, {}) if isinstance(item, str) else next(iter(item.items()))
        if index >= len(written):
            written.append(item)
        elif isinstance(written[index], dict):
            old = written[index]
            key = next(iter(old))
            merged = merge_in_place(old[key], params or {})
            if merged:
                old[key] = merged
            else:
                written[index] = name
        elif params:
            written[index] = _as_mapping(written, index, name, params)


def _as_mapping(sequence: Any, index: int, name: str, params: dict[str, Any]) -> Any:
    """``- name: {params}`` replacing ``- name``, the comment that followed the name kept beside it."""
    mapping = CommentedMap({name: params})
    comment = getattr(sequence, "ca", None) and sequence.ca.items.pop(index, None)
    token = comment[0] if comment else None
    if token is not None and token.value.strip().startswith("#"):
        mapping.yaml_add_eol_comment(token.value.strip()[1:].strip(), name)
    return mapping


def main(argv: list[str] | None = None) -> int:
    return delegate("tune", argv)


if __name__ == "__main__":
    sys.exit(main())

"""`rehear tune CORPUS -o tuned.yaml`: choose stage parameters and gate thresholds by k-fold
cross-validation and write a configuration `run` and `eval` accept."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Any

import numpy as np
import yaml
from tqdm import tqdm

from relay.cli.corpus_args import add_corpus_arguments, chosen_config, report_error, selected_items
from relay.core.config import LoadedConfig
from relay.core.errors import ConfigError, RehearError
from relay.core.yamlsource import load_yaml
from relay.workbench.evaluate import format_table, run_corpus, summarize
from relay.workbench.tuning import (
    DEFAULT_SPACE,
    RecordedFeatures,
    cross_validate,
    decisions_for,
    expand_space,
    fit,
    gate_settings,
    held_out_summary,
    make_folds,
)
from relay.workbench.variants import VariantBuilder, config_from_dict, with_overrides
from stages.gate.settings import GateSettings

__all__ = ["add_parser", "run"]

DESCRIPTION = """\
Tune the chain on a labelled corpus: language-model weights, lexicon thresholds and the gate
are chosen to make the fewest wrong accepts while asking back at most --max-clarify of the
utterances (then the lowest WER). Expensive stages run once per parameter setting; the gate
is fitted on the recorded scores two ways - its hand thresholds swept, and a learned
confidence (logistic regression on all the gate's features, including how the in-domain LM
judges the finished text) with its threshold swept - and the better one on the training
utterances is kept. Numbers printed are held-out only: each fold is scored with the choice,
model included, fitted on the other folds. The written configuration is fitted on the whole
(filtered) corpus.

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
    parser.add_argument("-o", "--output", type=Path, required=True, metavar="TUNED.yaml", help="configuration to write")
    parser.add_argument("--max-clarify", type=_share, default=0.25, metavar="SHARE",
                        help="most utterances that may be asked back, confirm + reprompt (default %(default)s)")
    parser.add_argument("--folds", type=int, default=5, help="cross-validation folds (default %(default)s)")
    parser.add_argument("--seed", type=int, default=20261202, help="seed for folds and sampling (default %(default)s)")
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


def _with_gate(loaded: LoadedConfig) -> LoadedConfig:
    """The chain with a gate at its end; an added gate judges the text with lm_rescore's model."""
    if any(spec.name == "gate" for spec in loaded.config.stages):
        return loaded
    raw = dict(loaded.source.value)
    model = next((spec.params.get("model") for spec in loaded.config.stages if spec.name == "lm_rescore"), None)
    raw["stages"] = [*(raw.get("stages") or []), {"gate": {"lm_model": model}} if model else "gate"]
    return config_from_dict(raw, base_dir=loaded.base_dir, label=loaded.source.file)


def _usable_space(args: argparse.Namespace, builder: VariantBuilder) -> dict[str, dict[str, list[Any]]]:
    space = DEFAULT_SPACE
    if args.space is not None:
        space = load_yaml(args.space).value
        if not isinstance(space, dict) or not all(isinstance(v, dict) for v in space.values()):
            raise ConfigError(f"Invalid search space {args.space}", ["write stage: {parameter: [values, ...]}"])
    usable: dict[str, dict[str, list[Any]]] = {}
    for stage, params in space.items():
        if stage == "gate":
            continue  # gate thresholds are swept on recorded scores, not re-run
        if stage not in builder.stage_names:
            print(f"rehear: the chain has no stage {stage}; not tuning its parameters", file=sys.stderr)
            continue
        known = builder.settings_fields(stage)
        for written, values in params.items():
            param = builder.current_name(stage, written)  # an old name means the setting's new place
            if param not in known:
                print(f"rehear: stage {stage} has no setting {param} (has: {', '.join(sorted(known))}); skipped",
                      file=sys.stderr)
            elif not isinstance(values, list) or not values:
                raise ConfigError(f"Invalid search space: {stage}.{param} must be a non-empty list")
            else:
                usable.setdefault(stage, {})[param] = values
    return usable


def _written_form(args: argparse.Namespace, loaded: LoadedConfig) -> dict[str, Any]:
    """The configuration as the user wrote it: ${VARIABLES} stay unexpanded, so no secret from
    the environment ends up in the tuned file."""
    raw: dict[str, Any] = dict(loaded.source.value)
    if args.config is not None:
        raw = yaml.safe_load(args.config.read_text(encoding="utf-8"))
    stages = list(raw.get("stages") or [])
    if not any((item if isinstance(item, str) else next(iter(item))) == "gate" for item in stages):
        stages.append("gate")
    return {**raw, "stages": stages}


def _absolute(params: dict[str, Any], base_dir: Path) -> dict[str, Any]:
    """Stage parameters with relative paths of existing files made absolute, in groups too."""
    return {k: _absolute(v, base_dir) if isinstance(v, dict)
            else str((base_dir / v).resolve()) if isinstance(v, str) and not Path(v).is_absolute()
            and (base_dir / v).exists() else v for k, v in params.items()}


def _portable(raw: dict[str, Any], base_dir: Path) -> dict[str, Any]:
    """Relative file paths made absolute, so the written file works from any folder."""
    out = dict(raw)
    if not Path(str(out.get("cache_dir", ".rehear-cache"))).is_absolute():
        out["cache_dir"] = str((base_dir / str(out.get("cache_dir", ".rehear-cache"))).resolve())
    stages = []
    for item in out.get("stages") or []:
        if isinstance(item, dict):
            name, params = next(iter(item.items()))
            item = {name: _absolute(params or {}, base_dir)}
        stages.append(item)
    out["stages"] = stages
    return out


def run(args: argparse.Namespace) -> int:
    progress = not args.no_progress
    try:
        loaded = _with_gate(chosen_config(args))
        items, described = selected_items(args, loaded)
        builder = VariantBuilder(loaded, progress=progress)
        space = _usable_space(args, builder)
        settings = expand_space(space, max_settings=args.max_settings, seed=args.seed)
        folds = make_folds(len(items), args.folds, args.seed)
        runs = [run_corpus(builder.chain(overrides), items, progress=False)
                for overrides in tqdm(settings, desc="settings", unit="run", disable=not progress)]
    except (RehearError, ValueError) as exc:
        return report_error(exc if isinstance(exc, RehearError) else ConfigError(str(exc)))
    recorded = [RecordedFeatures(outcomes) for outcomes in runs]
    gate_spec = next(spec for spec in loaded.config.stages if spec.name == "gate")
    base_gate = GateSettings.model_validate(gate_spec.params)

    def score(choice: Any, test: np.ndarray) -> Any:
        chosen = [runs[choice.setting][i] for i in test]
        return summarize(chosen, decisions=decisions_for(chosen, gate_settings(base_gate, choice.gate)))

    results = cross_validate(folds, lambda train: fit(recorded, train, max_clarify=args.max_clarify), score)
    held_out = held_out_summary(runs, results, base_gate)
    print(f"{len(settings)} stage setting(s) tried over {', '.join(f'{s}.{p}' for s in space for p in space[s]) or 'none'}")
    for result in results:
        s = result.score
        print(f"fold {result.fold + 1}/{len(folds)} (held out {len(result.test)}): WER {s.wer_relay:.1%} "
              f"(first {s.wer_first:.1%}), wrong accepts {s.wrong_accept_rate:.1%}, asked back {s.clarify_rate:.1%}")
    print(format_table(held_out, title=f"held-out folds pooled, {args.corpus} ({described}):"))
    final = fit(recorded, np.arange(len(items)), max_clarify=args.max_clarify)
    tuned_gate = gate_settings(base_gate, final.gate)
    dumped = tuned_gate.model_dump(mode="json")
    extra = ("reprompt_confidence",) if "accept_confidence" in final.gate else ()
    gate_params = {**gate_spec.params, **{k: dumped[k] for k in
                   (*final.gate, "reprompt_posterior", "reprompt_entity", *extra)}}
    overrides = {**settings[final.setting], "gate": gate_params}
    raw = _portable(with_overrides(_written_form(args, loaded), overrides), loaded.base_dir)
    header = (f"# rehear tune on {args.corpus} ({described}), {args.folds}-fold held-out: "
              f"WER {held_out.wer_relay:.1%}, wrong accepts {held_out.wrong_accept_rate:.1%}, "
              f"asked back {held_out.clarify_rate:.1%} (budget {args.max_clarify:.0%})\n")
    args.output.write_text(header + yaml.safe_dump(raw, sort_keys=False), encoding="utf-8")
    print(f"wrote {args.output}")
    return 0


def main(argv: list[str] | None = None) -> int:
    parser = _configure(argparse.ArgumentParser(prog="rehear tune", description=DESCRIPTION,
                                                formatter_class=argparse.RawDescriptionHelpFormatter))
    return run(parser.parse_args(argv))


if __name__ == "__main__":
    sys.exit(main())

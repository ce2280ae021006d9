"""`rehear check CONFIG`: validate a configuration, load every stage, print the chain."""

from __future__ import annotations

import argparse
import sys
import time

from relay.core.chain import Chain
from relay.core.config import build_chain, load_config
from relay.core.errors import ConfigError
from relay.core.setting_names import old_names_given, old_names_of
from relay.core.stage import files_used

HELP = "validate a configuration, load every stage and print the chain"


def add_parser(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = subparsers.add_parser(
        "check", help=HELP, description=HELP + ".\nEvery problem is named with its file, line and field.\n"
        "--no-load still finds files the stages would read that do not exist."
    )
    parser.add_argument("config", help="relay configuration (YAML)")
    parser.add_argument("--no-load", action="store_true", help="validate only; do not load models and lexicons")
    parser.set_defaults(handler=run)


def _missing(chain: Chain) -> list[str]:
    """Files a stage will read that are not there, found without loading anything."""
    return [f"stages[{index}] ({stage.name}): {role} file {path} does not exist"
            for index, stage in enumerate(chain.stages)
            for role, path in files_used(stage).items() if not path.is_file()]


def _old_names(chain: Chain) -> list[str]:
    """A line per stage written with the names its settings had before they were grouped."""
    lines = []
    for stage in chain.stages:
        given = old_names_given(getattr(stage, "settings", None))
        if given:
            moved = old_names_of(type(stage).Settings)
            names = ", ".join(f"{old} (now {moved[old]})" for old in given)
            lines.append(f"  {stage.name}: old setting names {names}")
    return lines


def run(args: argparse.Namespace) -> int:
    loaded = load_config(args.config)
    chain = build_chain(loaded, progress=sys.stderr.isatty())
    missing = _missing(chain)
    if missing:
        raise ConfigError(f"Invalid configuration {args.config}", missing)
    lines = []
    for index, stage in enumerate(chain.stages):
        began = time.perf_counter()
        if not args.no_load:
            stage.load()  # raises with the file and line of whatever the stage cannot read
        took = "" if args.no_load else f"  loaded in {time.perf_counter() - began:.2f} s"
        lines.append(f"    {index + 1}. {stage.name:<11} needs {', '.join(sorted(stage.needs)) or '-'}; "
                     f"provides {', '.join(sorted(stage.provides)) or '-'}{took}")
        lines += [f"         uses {role}: {path}" for role, path in files_used(stage).items()]
    config = loaded.config
    print(f"{args.config}: valid (config hash {loaded.hash})")
    print(f"  broker   {config.broker.host}:{config.broker.port} MQTT {config.broker.protocol}")
    print(f"  inputs   {', '.join(config.topics.inputs)} (QoS {config.topics.input_qos})")
    print(f"  output   {config.topics.output}   prompt {config.topics.prompt}   dead letters {config.topics.dead_letter}")
    print("  chain:")
    print("\n".join(lines))
    for line in _old_names(chain):
        print(line)
    return 0

"""`rehear stages`: the catalogue of stages with their settings."""

from __future__ import annotations

import argparse

from relay.core.errors import ConfigError
from relay.core.registry import Registry
from relay.core.setting_names import group_model, setting_fields

HELP = "list the stages a chain can use, with each stage's settings and defaults"


def add_parser(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = subparsers.add_parser("stages", help=HELP, description=HELP + ".")
    parser.add_argument("name", nargs="?", help="show only this stage")
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    registry = Registry()
    names = [args.name] if args.name else registry.names()
    for name in names:
        try:
            cls = registry.get(name)
        except ConfigError as exc:
            if args.name:
                raise
            print(f"{name}: unavailable ({exc.title})\n")
            continue
        doc = (cls.__doc__ or "").strip().splitlines()
        print(f"{name}: {doc[0] if doc else ''}")
        print(f"  needs {', '.join(sorted(cls.needs)) or '-'}; provides {', '.join(sorted(cls.provides)) or '-'}")
        for field_name, field in setting_fields(cls.Settings):
            if group_model(field.annotation) is not None:
                print(f"    {field_name + ':':<28} {field.description or ''}".rstrip())  # a group; its settings follow
                continue
            about = f"  {field.description}" if field.description else ""
            default = "required" if field.is_required() else f"default {field.get_default(call_default_factory=True)!r}"
            print(f"    {field_name:<28} {default}{about}")
        print()
    return 0

"""`rehear starter`: a commented, runnable configuration from a lexicon and in-domain text."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Any

from relay.cli.common import delegate, output_file
from relay.core.errors import ConfigError
from relay.workbench.starter import StarterFiles, write_starter

__all__ = ["add_parser", "run"]

HELP = "write a first configuration from your lexicon and in-domain text"
DESCRIPTION = """\
Write a commented relay configuration for your own domain: the default chain (normalize ->
lm_rescore -> lexicon -> gate) over your lexicon (docs/formats.md section 3) and in-domain
text, the NLU's training lines with {type} slots (section 4). The language model is built
from the text beside the configuration (as `rehear build-lm` would) unless --language-model
names one that exists and --rebuild-lm is not given. Paths in the file are relative to it,
every section says what it is for, capture: is there (off), and the gate is rehear's shipped
default until `rehear tune` fits one to your recogniser. The written file is checked as
`rehear check --no-load` would; then:

    rehear check relay.yaml && rehear run relay.yaml
"""


def add_parser(subparsers: Any) -> argparse.ArgumentParser:
    parser: argparse.ArgumentParser = subparsers.add_parser("starter", help=HELP, description=DESCRIPTION)
    parser.add_argument("--lexicon", type=Path, required=True, metavar="L", help="your lexicon (CSV, YAML or JSON)")
    parser.add_argument("--text", type=Path, required=True, metavar="T",
                        help="in-domain text: plain lines, or CSV / JSON Lines with a text column")
    parser.add_argument("--speakers", type=Path, metavar="S", help="speaker,id,affinity CSV (optional)")
    parser.add_argument("-o", "--output", type=output_file, required=True, metavar="RELAY.yaml",
                        help="configuration to write (refused when it exists, unless --force)")
    parser.add_argument("--language-model", type=output_file, metavar="MODEL.arpa",
                        help="the language model to name (default: beside the output, named after it)")
    parser.add_argument("--rebuild-lm", action="store_true",
                        help="build the language model even when --language-model exists")
    parser.add_argument("--force", action="store_true", help="overwrite an existing configuration")
    parser.set_defaults(handler=run)
    return parser


def run(args: argparse.Namespace) -> int:
    for label, path in (("--lexicon", args.lexicon), ("--text", args.text), ("--speakers", args.speakers)):
        if path is not None and not path.is_file():
            raise ConfigError(f"{label} {path}: no such file")
    if args.output.exists() and not args.force:
        raise ConfigError(f"{args.output} exists; give --force to overwrite it")
    model = args.language_model or args.output.with_suffix(".arpa")
    files = StarterFiles(output=args.output, lexicon=args.lexicon, text=args.text, language_model=model,
                         speakers=args.speakers)
    entries, types = write_starter(files, build_lm=args.rebuild_lm or args.language_model is None)
    print(f"wrote {args.output}: the default chain over {entries} lexicon entries ({', '.join(types)}), "
          f"language model {model}")
    print(f"next: rehear check {args.output}   then: rehear run {args.output}")
    return 0


def main(argv: list[str] | None = None) -> int:
    return delegate("starter", argv)


if __name__ == "__main__":
    sys.exit(main())

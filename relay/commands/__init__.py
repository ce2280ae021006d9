"""Command modules of the `rehear` CLI; each exposes add_parser(subparsers) and run(args)."""

"""Subcommands of the rehear command line; each module offers add_parser(subparsers) and run(args)."""

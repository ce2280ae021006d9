"""One module per `rehear` subcommand, each with ``add_parser(subparsers)`` and ``run(args)``."""

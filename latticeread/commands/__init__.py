"""One module per command-line command: ``add_parser(parser)`` and ``run(args) -> int``."""

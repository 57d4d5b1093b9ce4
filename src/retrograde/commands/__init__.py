"""One module per CLI command: ``configure(parser)`` and ``run(args) -> int``."""

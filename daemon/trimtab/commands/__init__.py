"""One module a sub-command; each provides ``add_arguments(parser)`` and ``run(args) -> int``."""

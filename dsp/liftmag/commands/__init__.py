"""Command-line verbs. Each module defines ``HELP``, ``add_arguments(parser)`` and
``run(args) -> int``; ``liftmag.cli`` imports a verb's module only when it is used."""

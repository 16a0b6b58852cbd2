"""The commands behind ``planner flow``, ``planner plan`` and ``planner study``.

One module per command. Each module has ``add_parser(subparsers)`` and ``run(args) -> int``.
This is the only place that prints, reads the command line or chooses an exit status; the
library below it returns results and reports progress through callbacks.
"""

"""Subcommands of ``spark-align``: one module each, with NAME, HELP, DESCRIPTION,
``add_arguments(parser)`` and ``run(args) -> exit code``. Add a module here to add a command."""

COMMAND_MODULES = ("train", "align", "evaluate", "export", "report", "demo")

"""Subcommands of the ``mfbridge`` console script (``mfbridge NAME ...``).

Each module has ``main(argv: list[str]) -> int`` and is registered in
:data:`mfbridge.runs.cli.SUBCOMMANDS`.
"""

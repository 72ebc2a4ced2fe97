"""One module per ``buttress`` subcommand (``HELP``, ``add_arguments``, ``run``)."""

import argparse


def positive_int(text: str) -> int:
    """Argument type for counts such as ``--workers``: a whole number >= 1."""
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number >= 1, got {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"expected a whole number >= 1, got {text!r}")
    return value

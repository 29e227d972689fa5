"""One module per ``lodemap`` sub-command (see ``mapping.cli``)."""

import argparse


def seed_arg(text):
    """argparse type of a ``--seed``: an integer >= 0 (what
    ``numpy.random.SeedSequence`` takes)."""
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected an integer >= 0, got {text!r}") from None
    if value < 0:
        raise argparse.ArgumentTypeError(f"expected an integer >= 0, got {value}")
    return value

"""The subcommands of `diag`, one module each (add_arguments, run)."""

from __future__ import annotations

import argparse


def count(text: str) -> int:
    """argparse type: a whole number, 0 or more (a seed, a number of draws)."""
    try:
        n = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a whole number") from None
    if n < 0:
        raise argparse.ArgumentTypeError("must be 0 or more")
    return n

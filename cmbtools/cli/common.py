"""Argument helpers shared by the subcommands."""

from __future__ import annotations

import argparse

__all__ = [
    "add_overwrite", "add_force", "add_threads", "positive_float", "positive_int", "finite_float", "bounded_int",
    "MAX_THREADS", "MAX_SIMULATIONS",
]


#: Upper bounds of counts given on the command line.
MAX_THREADS = 1024
MAX_SIMULATIONS = 1_000_000


def add_overwrite(parser):
    parser.add_argument("--overwrite", action="store_true", help="replace output files that already exist")


def add_force(parser):
    parser.add_argument(
        "--force", action="store_true",
        help="go ahead even when the memory estimate exceeds what the machine has available",
    )


def add_threads(parser):
    parser.add_argument(
        "--threads", type=bounded_int(MAX_THREADS), default=0, metavar="N",
        help="threads for the transforms (default: all cores)",
    )


def positive_float(text):
    v = finite_float(text)
    if not v > 0:
        raise argparse.ArgumentTypeError(f"expected a positive number, got {text!r}")
    return v


def positive_int(text):
    try:
        v = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
    if v < 0:
        raise argparse.ArgumentTypeError(f"expected a non-negative whole number, got {text!r}")
    return v


def bounded_int(maximum):
    """An argparse type: a whole number in [0, maximum] (a bound that keeps a typo from exhausting memory)."""
    def parse(text):
        v = positive_int(text)
        if v > maximum:
            raise argparse.ArgumentTypeError(f"expected at most {maximum}, got {text!r}")
        return v

    parse.__name__ = "whole number"
    return parse


def finite_float(text):
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number, got {text!r}") from None
    if v != v or v in (float("inf"), float("-inf")):
        raise argparse.ArgumentTypeError(f"expected a finite number, got {text!r}")
    return v

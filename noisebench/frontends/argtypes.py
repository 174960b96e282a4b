"""Pieces shared by the command-line front ends (``cli``, ``commands`` and ``dbcli``): exit
codes, the epilog with the safety cautions, argparse types and one-line messages.

Both front ends import these from here, so neither imports the other for them (``cli`` loads
``dbcli`` to register its subcommands; ``tests/test_layers.py`` checks the package has no
import cycle).
"""

from __future__ import annotations

import argparse
import math

from noisebench.running.safety import cautions_text

EXIT_OK = 0
EXIT_FAILED = 1
EXIT_INPUT = 2
EXIT_SAFETY = 3
EXIT_INSTRUMENT = 4
EXIT_MEASUREMENT = 5
EXIT_INTERRUPTED = 130

EPILOG = f"""\
exit codes: 0 ok, 2 bad input, 3 refused for safety, 4 instrument/communication fault,
5 measurement refused by the physics, 1 other failure, 130 interrupted.

Safety cautions (read before connecting real instruments):
{cautions_text()}
"""


def positive_seconds(text: str) -> float:
    """argparse type: a finite duration > 0 s (``nan``, ``inf``, 0 and negatives refused)."""
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number of seconds") from None
    if not (math.isfinite(value) and value > 0):
        raise argparse.ArgumentTypeError(f"must be a finite number of seconds > 0 (got {text})")
    return value


def non_negative_int(text: str) -> int:
    """argparse type: an integer >= 0 (simulator seeds)."""
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not an integer") from None
    if value < 0:
        raise argparse.ArgumentTypeError(f"must be >= 0 (got {value})")
    return value


def one_line(text: str) -> str:
    """``text`` on one line (a CLI message never spans lines)."""
    return " ".join(str(text).split())

"""The option vocabulary both command lines share, and the notice for an old spelling."""

from __future__ import annotations

import argparse
import math
import sys

__all__ = ["DeprecatedFlag", "deprecated", "positive"]

REMOVED_IN = "0.2"
"""The release in which the spellings deprecated in 0.1 stop working."""


def deprecated(old: str, new: str) -> None:
    """Tell the user, on stderr, that ``old`` still works this release but ``new`` is the name."""
    print(f"note: `{old}` is deprecated and goes in {REMOVED_IN}; use `{new}`", file=sys.stderr)


class DeprecatedFlag(argparse.Action):
    """An old option spelling that still works: stores its value under the new name, and warns.

    ``new`` (given through ``const``) is the spelling to print in the notice.
    """

    def __call__(self, parser: argparse.ArgumentParser, namespace: argparse.Namespace,
                 values: object, option_string: str | None = None) -> None:
        deprecated(f"{option_string}", str(self.const))
        setattr(namespace, self.dest, values)


def positive(text: str) -> float:
    """An argparse type: a finite number > 0 (``--speed``, ``--idle``, ``--timeout``)."""
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number") from None
    if not (math.isfinite(value) and value > 0.0):
        raise argparse.ArgumentTypeError(f"{text} must be a finite number > 0")
    return value

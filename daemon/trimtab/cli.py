"""The ``trimtab`` command line: one sub-command a module under ``trimtab.commands``.

Exit codes live here only: 0 success, 1 a runtime failure, 2 bad usage or bad input, 3 a
runtime fault of the daemon's state directory (``trimtab run`` cannot create, lock, write or
recover it: read-only, full at start, failing, or its state damaged beyond repair).
"""

from __future__ import annotations

import argparse
import importlib
import importlib.util
import sys
from collections.abc import Sequence

from trimtab.commands.options import EXIT_STATE, run_command
from trimtab.logs import configure_logging

__all__ = ["EXIT_STATE", "build_parser", "main"]

# sub-command name -> module under trimtab.commands providing add_arguments(p) and run(args) -> int
COMMANDS: dict[str, tuple[str, str]] = {
    "run": ("run", "run the daemon: subscribe, correct, publish"),
    "check": ("check", "validate a config and print the derived stability figures"),
    "schema": ("schema", "print the config's JSON Schema"),
    "fit": ("fit", "fit one sensor's model in closed form from collocation data"),
    "replay": ("replay", "run the engine over a stream file, offline"),
    "state": ("state", "show, export or import a sensor's model state"),
    "tune": ("tune", "evaluate candidate learning settings on a recorded stream"),
    "convert": ("convert", "turn an operator's CSV file into a stream file"),
}


def _available() -> dict[str, tuple[str, str]]:
    """The sub-commands whose module is present in this build."""
    found = {}
    for name, (module, help_text) in COMMANDS.items():
        if importlib.util.find_spec(f"trimtab.commands.{module}") is not None:
            found[name] = (module, help_text)
    return found


def build_parser() -> argparse.ArgumentParser:
    from trimtab import __version__

    parser = argparse.ArgumentParser(
        prog="trimtab",
        description="Online recalibration of drifting low-cost sensors over MQTT.",
    )
    parser.add_argument("--version", action="version", version=f"trimtab {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)
    for name, (module, help_text) in _available().items():
        mod = importlib.import_module(f"trimtab.commands.{module}")
        p = sub.add_parser(name, help=help_text, description=help_text)
        mod.add_arguments(p)
        p.set_defaults(_run=mod.run)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``trimtab`` console script."""
    parser = build_parser()
    args = parser.parse_args(argv)
    # Tool commands log warnings only, to stderr; `run` reconfigures from its config.
    configure_logging("warning")
    return run_command("trimtab", args)


if __name__ == "__main__":
    sys.exit(main())

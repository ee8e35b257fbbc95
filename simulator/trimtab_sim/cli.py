"""The trimtab-sim command line: generate, play, record and score streams; bench; demo."""

from __future__ import annotations

import argparse
import importlib
import importlib.util
import sys
from collections.abc import Sequence

from trimtab.commands.options import deprecated, run_command

COMMANDS: dict[str, tuple[str, str]] = {
    "make": ("make", "generate a seeded stream from a scenario"),
    "play": ("play", "publish a stream file to a broker"),
    "record": ("record", "record corrected values from a broker to a stream file"),
    "score": ("score", "score a corrected stream against truth"),
    "bench": ("bench", "measure throughput, latency and memory"),
    "demo": ("demo", "run the whole loop on the embedded default scenario"),
}


def build_parser() -> argparse.ArgumentParser:
    from trimtab import __version__

    parser = argparse.ArgumentParser(
        prog="trimtab-sim",
        description="Simulated sensor streams for trimtab: generate, play, record and score "
                    "them; measure the daemon; run the whole loop.",
    )
    parser.add_argument("--version", action="version", version=f"trimtab-sim {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)
    for name, (module, help_text) in COMMANDS.items():
        if importlib.util.find_spec(f"trimtab_sim.commands.{module}") is None:
            continue
        mod = importlib.import_module(f"trimtab_sim.commands.{module}")
        p = sub.add_parser(name, help=help_text, description=help_text)
        mod.add_arguments(p)
        p.set_defaults(_run=mod.run)
    return parser


def old_spellings(argv: Sequence[str]) -> list[str]:
    """0.1's option values that changed meaning, rewritten to 0.2's names with a notice.

    ``record --quiet SECONDS`` is now ``--idle SECONDS`` (``--quiet`` is a flag);
    ``bench --json FILE`` is now ``-o FILE`` (``--json`` is a flag that prints JSON).
    """
    out = list(argv)
    command = next((a for a in out if not a.startswith("-")), None)
    renames = {"record": ("--quiet", "--idle", "SECONDS"), "bench": ("--json", "-o", "FILE")}
    if command not in renames:
        return out
    old, new, what = renames[command]
    for i, arg in enumerate(out[:-1]):
        value = out[i + 1]
        takes_value = not value.startswith("-") and (
            command == "bench" or value.replace(".", "", 1).isdigit())
        if arg == old and takes_value:
            deprecated(f"{old} {what}", f"{new} {what}")
            out[i] = new
    return out


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``trimtab-sim`` console script."""
    args = build_parser().parse_args(old_spellings(sys.argv[1:] if argv is None else argv))
    return run_command("trimtab-sim", args)


if __name__ == "__main__":
    sys.exit(main())

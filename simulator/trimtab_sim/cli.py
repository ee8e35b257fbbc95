"""The ``trimtab-sim`` command line."""

from __future__ import annotations

import argparse
import importlib
import importlib.util
import os
import sys
from collections.abc import Sequence

from trimtab.errors import ConfigError, TrimtabError

COMMANDS: dict[str, tuple[str, str]] = {
    "make": ("make", "generate a seeded stream from a scenario"),
    "play": ("play", "publish a stream file to a broker"),
    "record": ("record", "record corrected values from a broker to a stream file"),
    "score": ("score", "score a corrected stream against truth"),
    "bench": ("bench", "measure throughput, latency and memory"),
    "demo": ("demo", "run the whole loop on the embedded default scenario"),
}


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="trimtab-sim", description=__doc__)
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)
    for name, (module, help_text) in COMMANDS.items():
        if importlib.util.find_spec(f"trimtab_sim.commands.{module}") is None:
            continue
        mod = importlib.import_module(f"trimtab_sim.commands.{module}")
        p = sub.add_parser(name, help=help_text, description=help_text)
        mod.add_arguments(p)
        p.set_defaults(_run=mod.run)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``trimtab-sim`` console script."""
    args = build_parser().parse_args(argv)
    try:
        code: int = args._run(args)
    except ConfigError as exc:
        for line in exc.errors:
            print(f"trimtab-sim {args.command}: {line}", file=sys.stderr)
        return 2
    except TrimtabError as exc:
        print(f"trimtab-sim {args.command}: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        return 130
    except OSError as exc:
        # a file the command named could not be opened or written: one line, the file named
        where = exc.filename if exc.filename is not None else "a file"
        print(f"trimtab-sim {args.command}: {where}: {exc.strerror or exc}", file=sys.stderr)
        return 2
    except Exception as exc:  # the last line of defence: no traceback reaches a user
        if os.environ.get("TRIMTAB_TRACEBACK"):
            raise
        print(f"trimtab-sim {args.command}: internal error: {type(exc).__name__}: {exc} "
              "(a bug; TRIMTAB_TRACEBACK=1 shows where)", file=sys.stderr)
        return 1
    return code


if __name__ == "__main__":
    sys.exit(main())

"""What both command lines share: the option vocabulary, old spellings, and running a command
so that every error is one line and an exit code."""

from __future__ import annotations

import argparse
import math
import os
import sys

from trimtab.errors import ConfigError, StateFault, TrimtabError

__all__ = ["EXIT_STATE", "DeprecatedFlag", "deprecated", "positive", "run_command"]

EXIT_STATE = 3
"""Exit status when the daemon cannot use its state directory (a runtime fault, not usage)."""


def run_command(prog: str, args: argparse.Namespace) -> int:
    """Run a parsed sub-command (``args._run``); turn every error into one line and a status.

    2: bad usage, config or input (the project's errors, and files that cannot be opened);
    3: the state directory cannot be used; 130: interrupted; 141: the reader of the output
    went away; 1: anything else, which is a bug (``TRIMTAB_TRACEBACK=1`` shows where).
    """
    name = f"{prog} {args.command}"
    try:
        code: int = args._run(args)
    except ConfigError as exc:
        for line in exc.errors:
            print(f"{name}: {line}", file=sys.stderr)
        return 2
    except StateFault as exc:
        print(f"{name}: {exc}", file=sys.stderr)
        return EXIT_STATE
    except TrimtabError as exc:
        print(f"{name}: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print(f"{name}: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        # the reader of our output went away (`| head`): stop quietly, as shell tools do
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return 141
    except OSError as exc:
        # a file the command named could not be opened or written: one line, the file named
        where = exc.filename if exc.filename is not None else "a file"
        print(f"{name}: {where}: {exc.strerror or exc}", file=sys.stderr)
        return 2
    except Exception as exc:  # the last line of defence: no traceback reaches a user
        if os.environ.get("TRIMTAB_TRACEBACK"):
            raise
        print(f"{name}: internal error: {type(exc).__name__}: {exc} "
              "(a bug; TRIMTAB_TRACEBACK=1 shows where)", file=sys.stderr)
        return 1
    return code

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

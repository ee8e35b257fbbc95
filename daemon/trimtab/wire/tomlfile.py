"""Reading a TOML file the one way every trimtab file is read: clear errors, never empty."""

from __future__ import annotations

import os
import re
import tomllib
from typing import Any

from trimtab.errors import ConfigError, TrimtabError


def read_toml(path: str | os.PathLike[str], what: str,
              error: type[TrimtabError] = ConfigError) -> dict[str, Any]:
    """The table in a TOML file; ``error`` names the file and what is wrong (with line, column).

    ``what`` names the kind of file in messages ("config file", "grid file", "scenario file").
    A missing or unreadable file is an error, never an empty table.
    """
    source = os.fspath(path)
    try:
        with open(source, "rb") as fh:
            return tomllib.load(fh)
    except FileNotFoundError:
        raise error(f"{source}: {what} not found") from None
    except OSError as exc:
        raise error(f"{source}: cannot read the {what}: {exc.strerror}") from exc
    except UnicodeDecodeError as exc:
        raise error(f"{source}: not UTF-8 text (byte {exc.start})") from None
    except tomllib.TOMLDecodeError as exc:
        text = str(exc)
        m = re.search(r"\(at line (\d+), column (\d+)\)", text)
        where = f"line {m.group(1)}, column {m.group(2)}" if m else "end of file"
        reason = re.sub(r"\s*\(at (line \d+, column \d+|end of document)\)", "", text)
        raise error(f"{source}: {where}: TOML syntax error: {reason}") from None

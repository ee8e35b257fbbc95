"""Pydantic validation errors as one line per problem, at a dotted TOML path.

Every file trimtab reads through pydantic (the config, a CSV mapping) reports its problems the
same way: ``<dotted.path>: <message>``, an unknown key with the closest allowed one, and the
cross-field rule errors of a section unfolded into their own paths.
"""

from __future__ import annotations

import difflib
import json
import re
import types
from collections.abc import Iterator
from typing import Annotated, Any, Union, get_args, get_origin

from pydantic import BaseModel, ValidationError
from pydantic_core import PydanticCustomError

__all__ = ["Loc", "Problems", "dotted", "expand_errors", "key", "refuse"]

Loc = tuple[str | int, ...]
Problems = list[tuple[Loc, str]]
_RULE = "config_rule"

def refuse(problems: Problems) -> None:
    """Raise the cross-field problems of one section as one error that keeps each path."""
    if problems:
        raise PydanticCustomError(_RULE, "{first}", {"first": problems[0][1], "problems": problems})


_BARE = re.compile(r"^[A-Za-z0-9_-]+$")


def key(part: str) -> str:
    """A TOML key, quoted when it is not bare."""
    return part if _BARE.fullmatch(part) else json.dumps(part)


def dotted(loc: Loc) -> str:
    """A pydantic location as a dotted TOML path: ``sensors.overrides."pm.01".inputs[0]``."""
    out = ""
    for part in loc:
        if isinstance(part, int):
            out += f"[{part}]"
        else:
            out += ("." if out else "") + key(part)
    return out or "(top level)"


def _unwrap(tp: Any) -> Any:
    while True:
        if get_origin(tp) is Annotated:
            tp = get_args(tp)[0]
        elif get_origin(tp) in (Union, types.UnionType):
            args = [a for a in get_args(tp) if a is not type(None)]
            if len(args) != 1:
                return tp
            tp = args[0]
        else:
            return tp


def _keys_at(root: type[BaseModel], loc: Loc) -> list[str] | None:
    """The keys allowed in the table at ``loc`` (walking the models' annotations)."""
    tp: Any = root
    for part in loc:
        tp = _unwrap(tp)
        if isinstance(tp, type) and issubclass(tp, BaseModel):
            found = [f for n, f in tp.model_fields.items() if (f.alias or n) == part]
            if not found:
                return None
            tp = found[0].annotation
        elif get_origin(tp) in (dict, tuple, list):
            tp = get_args(tp)[-1 if get_origin(tp) is dict else 0]
        else:
            return None
    tp = _unwrap(tp)
    if isinstance(tp, type) and issubclass(tp, BaseModel):
        return [f.alias or n for n, f in tp.model_fields.items()]
    return None


def _unknown_key(root: type[BaseModel], loc: Loc) -> str:
    if loc == ("broker", "password"):
        return (
            "an inline password is refused (it would sit in this file and its backups); "
            "set broker.password_env to the name of an environment variable holding it, "
            "or broker.password_file to a file only the daemon can read"
        )
    allowed = _keys_at(root, loc[:-1]) or []
    close = difflib.get_close_matches(str(loc[-1]), allowed, n=1)
    hint = f"did you mean {close[0]!r}? " if close else ""
    return f"unknown key; {hint}allowed: {', '.join(allowed)}"


def expand_errors(exc: ValidationError, root: type[BaseModel]) -> Iterator[tuple[Loc, str]]:
    """Each pydantic error as (location, message); rule errors unfold into their problems."""
    for err in exc.errors(include_url=False):
        loc: Loc = tuple(err["loc"])
        kind = err["type"]
        if kind == _RULE:
            for rel, msg in err["ctx"]["problems"]:
                yield (*loc, *rel), msg
        elif kind == "extra_forbidden":
            yield loc, _unknown_key(root, loc)
        elif kind == "missing":
            yield loc, "required key is missing"
        else:
            msg = err["msg"].removeprefix("Value error, ")
            value = err.get("input")
            if isinstance(value, bool | int | float) or (
                isinstance(value, str) and len(value) < 200
            ):
                msg += f" (got {json.dumps(value, ensure_ascii=False)})"
            yield loc, msg

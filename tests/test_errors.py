"""One error family: the daemon raises trimtab's own errors, never a bare built-in one."""

from __future__ import annotations

import ast
from pathlib import Path

from trimtab.errors import ArgumentError, EncodeError, TrimtabError

ROOT = Path(__file__).resolve().parents[1] / "daemon" / "trimtab"
BUILTIN = {"ValueError", "TypeError", "RuntimeError", "KeyError", "Exception", "AssertionError",
           "IndexError", "OSError"}
PYDANTIC_VALIDATORS = {("config/connection.py", "_status_template"),
                       ("config/sensors.py", "_sensor_id"), ("config/sensors.py", "_input_name"),
                       ("config/sensors.py", "_pattern")}
"""Functions pydantic calls as validators: a ``ValueError`` is how they say no (pydantic turns
it into a validation error with the field's path)."""
CAUGHT_AT_ONCE = {("store/journal.py", "_write")}
"""A built-in error raised into its own ``except`` right below, which wraps it (a write that made
no progress is handled like the OSError of a failed write)."""


def _bare_raises(path: Path) -> list[tuple[str, int]]:
    """(enclosing function, line) of each ``raise <built-in error>(...)`` in ``path``."""
    found: list[tuple[str, int]] = []

    def visit(node: ast.AST, func: str) -> None:
        for child in ast.iter_child_nodes(node):
            name = func
            if isinstance(child, ast.FunctionDef | ast.AsyncFunctionDef):
                name = child.name
            if isinstance(child, ast.Raise) and isinstance(child.exc, ast.Call):
                f = child.exc.func
                if isinstance(f, ast.Name) and f.id in BUILTIN:
                    found.append((name, child.lineno))
            visit(child, name)

    visit(ast.parse(path.read_text(encoding="utf-8")), "")
    return found


def test_the_daemon_raises_only_its_own_errors() -> None:
    """Every raise in daemon/trimtab names an error of trimtab.errors, but pydantic validators."""
    bad = []
    for path in sorted(ROOT.rglob("*.py")):
        rel = path.relative_to(ROOT).as_posix()
        bad += [f"{rel}:{line} in {func}()" for func, line in _bare_raises(path)
                if (rel, func) not in PYDANTIC_VALIDATORS | CAUGHT_AT_ONCE]
    assert bad == []


def test_the_check_finds_a_bare_raise(tmp_path: Path) -> None:
    """The scan reports a bare ValueError and its function, and passes a family error."""
    src = tmp_path / "m.py"
    src.write_text("def f():\n    raise ValueError('x')\n\ndef g():\n    raise DataError('y')\n")
    assert _bare_raises(src) == [("f", 2)]


def test_argument_and_encode_errors_are_value_errors_too() -> None:
    """Callers that catch ValueError (pydantic, the standard library's habits) still see them."""
    for cls in (ArgumentError, EncodeError):
        assert issubclass(cls, TrimtabError) and issubclass(cls, ValueError)

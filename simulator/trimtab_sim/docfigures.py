"""The figures and reference tables in the docs, written between markers from their sources.

Each block sits in a Markdown file between ``<!-- NAME -->`` and ``<!-- /NAME -->`` and is made
by one function here from what it documents, so it cannot drift from the code:

* ``config:keys`` in ``config/README.md``: every key of the pydantic config tree
  (``trimtab.config.tree.Config``) with its type, default and meaning, and whether a SIGHUP
  applies it live (``RELOADABLE``, ``SERVING``);
* ``scenarios:table`` in ``simulator/README.md``: each example scenario of ``config/scenarios``
  generated with seed 0, replayed through ``config/demo.toml`` and scored as
  ``trimtab-sim score --scenario`` would;
* ``soak:scales`` in ``simulator/README.md``: the soak's two scales (``trimtab_sim.soak.SCALES``);
* ``bench:table`` in ``simulator/README.md``: ``trimtab-sim bench``'s own table
  (``trimtab_sim.bench.format_table``) of the recorded run in ``simulator/figures/bench.json``;
* ``realdata:table`` in ``README.md``: the real-data table of :mod:`trimtab_sim.realdata`.

``python -m trimtab_sim.docfigures`` rewrites every block (``--check``: exit 1 naming the blocks
that differ, writing nothing); name blocks to do only those. ``tests/sim/test_docfigures.py``
compares the cheap blocks on every run; ``tests/sim/test_realdata.py`` compares the real-data
table.
"""

from __future__ import annotations

import argparse
import json
import re
import sys
import tempfile
import tomllib
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parents[2]
BENCH_RUN = ROOT / "simulator" / "figures" / "bench.json"
"""The recorded ``trimtab-sim bench -o`` run the bench table shows."""

_SECTION_TITLES = {
    "sensors.overrides": "[sensors.overrides.<id>]",
    "sensors.shared_references[]": "[[sensors.shared_references]]",
}


# -- blocks in files -----------------------------------------------------------------------------


def block(text: str, name: str) -> str:
    """The text between ``<!-- name -->`` and ``<!-- /name -->`` (without the marker lines)."""
    start, end = f"<!-- {name} -->\n", f"<!-- /{name} -->"
    if start not in text or end not in text:
        raise ValueError(f"markers <!-- {name} --> … <!-- /{name} --> not found")
    return text.split(start, 1)[1].split(end, 1)[0]


def replace_block(text: str, name: str, body: str) -> str:
    """``text`` with the block ``name`` holding ``body`` (one trailing newline)."""
    old = block(text, name)
    start = f"<!-- {name} -->\n"
    return text.replace(start + old, start + body.rstrip("\n") + "\n", 1)


# -- the configuration reference -----------------------------------------------------------------


def _schema() -> dict[str, Any]:
    from trimtab.config import Config

    return Config.model_json_schema(by_alias=True)


def _type(s: dict[str, Any], defs: dict[str, Any]) -> str:
    """A schema node as words: ``string``, ``list of string``, ``"a" \\| "b"`` …"""
    if "$ref" in s:
        return "table"
    if "anyOf" in s:
        options = [o for o in s["anyOf"] if o.get("type") != "null"]
        words = " or ".join(_type(o, defs) for o in options)
        return words + (" (optional)" if len(options) < len(s["anyOf"]) else "")
    if "enum" in s:
        return " \\| ".join(json.dumps(v) for v in s["enum"])
    kind = s.get("type")
    if kind == "array":
        items = s.get("items", {})
        if "prefixItems" in items:
            inner = {_type(p, defs) for p in items["prefixItems"]}
            return "list of pair of " + " or ".join(sorted(inner))
        return "list of " + _type(items, defs)
    if kind == "object":
        if "patternProperties" in s:
            return "table of tables"
        extra = s.get("additionalProperties")
        return "table of " + _type(extra, defs) if isinstance(extra, dict) else "table"
    return str(kind)


def _default(s: dict[str, Any], required: bool) -> str:
    if required:
        return "required"
    if s.get("default") is None:
        return "unset"
    return f"`{json.dumps(s['default'], ensure_ascii=False)}`"


def config_rows() -> list[tuple[str, str, str, str, str]]:
    """(section, dotted key, type, default, meaning) for every leaf key of the config tree."""
    from trimtab.config import RELOADABLE, SERVING

    schema = _schema()
    defs = schema["$defs"]

    def resolve(s: dict[str, Any]) -> dict[str, Any]:
        return dict(defs[s["$ref"].rsplit("/", 1)[-1]]) if "$ref" in s else s

    rows: list[tuple[str, str, str, str, str]] = []

    def walk(node: dict[str, Any], prefix: str) -> None:
        required = set(node.get("required", ()))
        leaves: list[tuple[str, str, dict[str, Any]]] = []
        special: list[tuple[str, str, dict[str, Any]]] = []
        tables: list[tuple[str, dict[str, Any]]] = []
        for name, sub in node["properties"].items():
            path = f"{prefix}.{name}" if prefix else name
            r = resolve(sub)
            if "properties" in r:
                tables.append((path, r))
            elif r.get("type") == "array" and "$ref" in r.get("items", {}):
                tables.append((path + "[]", resolve(r["items"])))
            else:
                (special if path in _SECTION_TITLES else leaves).append((name, path, r))
        for name, path, r in leaves + special:
            meaning = r.get("description", "")
            if path in RELOADABLE:
                meaning += " *(live on reload)*"
            elif path in SERVING:
                meaning += " *(live on reload with `topics.subscribe = \"wildcard\"`)*"
            section = _SECTION_TITLES.get(path) or _SECTION_TITLES.get(prefix) or f"[{prefix}]"
            rows.append((section, path, _type(r, defs), _default(r, name in required),
                         meaning.replace("|", "\\|")))
        for path, r in tables:
            walk(r, path)

    for name, sub in schema["properties"].items():
        walk(resolve(sub), name)
    return rows


def config_keys() -> str:
    """The ``config:keys`` block: one table per TOML table of the config tree."""
    out: list[str] = []
    current = None
    for title, path, kind, default, meaning in config_rows():
        if title != current:
            out += (["", f"**`{title}`**", ""] if out else [f"**`{title}`**", ""])
            out += ["| key | type | default | meaning |", "|---|---|---|---|"]
            current = title
        out.append(f"| `{path}` | {kind} | {default} | {meaning} |")
    return "\n".join(out)


# -- the example scenarios -----------------------------------------------------------------------


def _demo_config(tmp: Path) -> Path:
    from trimtab.commands.check import to_toml

    data = tomllib.loads((ROOT / "config" / "demo.toml").read_text(encoding="utf-8"))
    data["state"]["dir"] = str(tmp / "state")
    path = tmp / "daemon.toml"
    path.write_text("\n".join(to_toml(data)) + "\n", encoding="utf-8")
    return path


def scenario_rows() -> list[tuple[str, str, str, float, float, float, float]]:
    """(name, unit, description, raw, corrected, oracle RMSE, required improvement) each."""
    from trimtab.config import load_config
    from trimtab.engine.wiring import make_engine
    from trimtab.wire.streamfile import read_events
    from trimtab_sim.generate import write_stream
    from trimtab_sim.scenario import load_scenario
    from trimtab_sim.score import Settings, join, score

    rows = []
    with tempfile.TemporaryDirectory(prefix="trimtab-docfigures-") as tmp:
        cfg = load_config(_demo_config(Path(tmp)))
        for path in sorted((ROOT / "config" / "scenarios").glob("*.toml")):
            sc = load_scenario(path)
            stream = Path(tmp) / f"{path.stem}.jsonl"
            write_stream(sc, stream, 0)
            engine = make_engine(cfg)
            events = list(read_events(stream))
            corrected = [c for e in events for c in engine.process(e)]
            stamps = {r.stamp for r in sc.references} | {c.stamp for c in sc.checks}
            settings = Settings(oracle_days=sc.score.oracle_days,
                                oracle_lambda=sc.score.oracle_lambda,
                                recovery_window=sc.score.recovery_window,
                                recovery_tolerance=sc.score.recovery_tolerance,
                                min_improvement=sc.score.min_improvement,
                                stamp=stamps.pop() if len(stamps) == 1 else "end")
            m = score(join(events, corrected), settings).overall.metrics
            rows.append((sc.name, sc.signal.unit, sc.description, m["raw"].rmse,
                         m["corrected"].rmse, m["oracle"].rmse, sc.score.min_improvement))
    return rows


def _g(x: float) -> str:
    """Four significant digits, trailing zeros kept."""
    return f"{x:#.4g}"


def scenarios_table() -> str:
    """The ``scenarios:table`` block."""
    out = ["| scenario | what it simulates | unit | raw RMSE | corrected RMSE | oracle RMSE "
           "| improvement | required |", "|---|---|---|---|---|---|---|---|"]
    for name, unit, what, raw, fixed, oracle, need in scenario_rows():
        out.append(f"| `{name}` | {what} | {unit} | {_g(raw)} | {_g(fixed)} | {_g(oracle)} | "
                   f"{100 * (1 - fixed / raw):.1f} % | {100 * need:.0f} % |")
    return "\n".join(out)


# -- soak scales, bench run, real data -----------------------------------------------------------


def soak_scales() -> str:
    """The ``soak:scales`` block: what each scale does, from ``trimtab_sim.soak.SCALES``."""
    from trimtab_sim.soak import SCALES

    ci, full = SCALES["ci"], SCALES["full"]
    rows = [("kill -9 points in the crash scenario", ci.kills, full.kills),
            ("broker restarts", ci.broker_restarts, full.broker_restarts),
            ("fuzz inputs per decoder", ci.fuzz_inputs, full.fuzz_inputs),
            ("malformed messages over the broker", ci.malformed, full.malformed),
            ("seconds of overload", ci.overload_seconds, full.overload_seconds)]
    out = ["| scale knob (`trimtab_sim.soak.SCALES`) | `ci` (every `make test`) "
           "| `full` (`make soak`) |", "|---|---:|---:|"]
    out += [f"| {name} | {a:,g} | {b:,g} |" for name, a, b in rows]
    return "\n".join(out)


def bench_table(path: Path = BENCH_RUN) -> str:
    """The ``bench:table`` block: ``trimtab-sim bench``'s table of the recorded run."""
    from trimtab_sim.bench import format_table

    return format_table(json.loads(path.read_text(encoding="utf-8")))


def realdata_table() -> str:
    """The ``realdata:table`` block (three schedules, guards on and off: the slowest block)."""
    from trimtab_sim.realdata import table

    return "\n".join(table())


BLOCKS: dict[str, tuple[Path, Callable[[], str]]] = {
    "config:keys": (ROOT / "config" / "README.md", config_keys),
    "scenarios:table": (ROOT / "simulator" / "README.md", scenarios_table),
    "soak:scales": (ROOT / "simulator" / "README.md", soak_scales),
    "bench:table": (ROOT / "simulator" / "README.md", bench_table),
    "realdata:table": (ROOT / "README.md", realdata_table),
}


def main(argv: Sequence[str] | None = None) -> int:
    """Rewrite (or with ``--check`` compare) the named blocks, or all of them."""
    parser = argparse.ArgumentParser(prog="python -m trimtab_sim.docfigures",
                                     description="write the docs' generated blocks")
    parser.add_argument("names", nargs="*", metavar="BLOCK",
                        help=f"blocks to write (default: all): {', '.join(BLOCKS)}")
    parser.add_argument("--check", action="store_true",
                        help="write nothing; exit 1 naming each block that differs")
    args = parser.parse_args(argv)
    unknown = [n for n in args.names if n not in BLOCKS]
    if unknown:
        parser.error(f"unknown block(s) {', '.join(unknown)}; known: {', '.join(BLOCKS)}")
    stale = []
    for name in args.names or list(BLOCKS):
        path, make = BLOCKS[name]
        text = path.read_text(encoding="utf-8")
        new = replace_block(text, name, make())
        if new == text:
            continue
        stale.append(f"{path.relative_to(ROOT)}: {name}")
        if not args.check:
            path.write_text(new, encoding="utf-8")
    for line in stale:
        print(("differs: " if args.check else "wrote: ") + line, file=sys.stderr)
    return 1 if args.check and stale else 0


_MARKER = re.compile(r"<!-- ([a-z]+:[a-z]+) -->")
"""A generated block's opening marker, for finding every block in a file."""


def markers(text: str) -> list[str]:
    """The names of the generated blocks ``text`` holds, in order."""
    return _MARKER.findall(text)


if __name__ == "__main__":
    raise SystemExit(main())

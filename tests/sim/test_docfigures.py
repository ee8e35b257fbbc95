"""The docs hold what the code says: generated blocks, metric names, links, paths, the module map.

The generated blocks are written by :mod:`trimtab_sim.docfigures`; each test here regenerates
one and compares (the real-data table is compared in ``tests/sim/test_realdata.py``). The
other checks hold hand-written parts of the docs to the repository: every relative link and
anchor resolves, every path named exists, DEVELOPERS.md's module map lists exactly the modules
there are, and the metrics table names exactly the families the endpoint serves.
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

import pytest

from trimtab.config import MetricsSettings
from trimtab.service.metrics import Metrics
from trimtab_sim import docfigures
from trimtab_sim.docfigures import block, markers, replace_block
from trimtab_sim.scenario import Scenario

ROOT = Path(__file__).resolve().parents[2]
PAGES = [ROOT / "README.md", ROOT / "DEVELOPERS.md", ROOT / "config" / "README.md",
         ROOT / "simulator" / "README.md"]


def _shown(name: str) -> str:
    path, _ = docfigures.BLOCKS[name]
    return block(path.read_text(encoding="utf-8"), name).rstrip("\n")


class TestGeneratedBlocks:
    def test_config_reference_is_the_config_tree(self) -> None:
        """config/README.md's key tables are what the pydantic tree generates today."""
        assert _shown("config:keys") == docfigures.config_keys()

    def test_scenario_table_is_what_the_scenarios_score(self) -> None:
        """simulator/README.md's scenario table is each example scenario scored afresh."""
        assert _shown("scenarios:table") == docfigures.scenarios_table()

    def test_soak_scales_are_the_soak_runner_s(self) -> None:
        """simulator/README.md's soak scales are trimtab_sim.soak.SCALES."""
        assert _shown("soak:scales") == docfigures.soak_scales()

    def test_bench_table_is_the_recorded_run(self) -> None:
        """simulator/README.md's bench figures are format_table of simulator/figures/bench.json."""
        assert _shown("bench:table") == docfigures.bench_table()

    def test_every_marker_in_the_docs_has_a_generator(self) -> None:
        """No page holds a generated-looking block that nothing writes, and each block once."""
        found = [(page, name) for page in PAGES
                 for name in markers(page.read_text(encoding="utf-8"))]
        assert sorted(name for _, name in found) == sorted(docfigures.BLOCKS)
        for page, name in found:
            assert docfigures.BLOCKS[name][0] == page, (page, name)

    def test_replace_block_rewrites_only_the_block(self) -> None:
        """Replacing a block keeps the markers and everything around them."""
        text = "a\n<!-- x:y -->\nold\n<!-- /x:y -->\nb\n"
        assert replace_block(text, "x:y", "new") == "a\n<!-- x:y -->\nnew\n<!-- /x:y -->\nb\n"
        with pytest.raises(ValueError, match="markers"):
            block("no markers", "x:y")


def _config_keys_listed(text: str) -> set[str]:
    section = block(text, "config:keys")
    return set(re.findall(r"^\| `([^`]+)` \|", section, flags=re.MULTILINE))


class TestHandWrittenReference:
    def test_metrics_table_names_every_family_served(self) -> None:
        """The metrics table lists exactly the families the endpoint serves, with their type."""
        text = (ROOT / "config" / "README.md").read_text(encoding="utf-8")
        section = text.split("## Metrics (Prometheus)")[1].split("\n## ")[0]
        documented: set[tuple[str, str]] = set()
        for line in section.splitlines():
            if line.startswith("| `trimtab_"):
                names_cell, kind = line.split("|")[1], line.split("|")[2].strip()
                documented |= {(n, kind) for n in re.findall(r"`(trimtab_\w+)`", names_cell)}
        served = {(f.name + ("_total" if f.type == "counter" else ""), f.type)
                  for f in Metrics(MetricsSettings()).families()}
        assert documented == served

    @pytest.mark.parametrize("page", PAGES, ids=lambda p: str(p.relative_to(ROOT)))
    def test_every_config_key_named_in_prose_exists(self, page: Path) -> None:
        """A `section.key` the docs name is a key (or table) of the config tree."""
        keys = {path for _, path, *_ in docfigures.config_rows()}
        tables = {k.rsplit(".", i)[0] for k in keys for i in range(1, 4)}
        refused = {"broker.password"}  # named as what the config refuses
        named = re.findall(r"`((?:broker|topics|payload|sensors|learning|pairing|output|state"
                           r"|logging|status|metrics)(?:\.[a-z_\[\]]+)+)`",
                           page.read_text(encoding="utf-8"))
        assert [k for k in named if not k.endswith(".py")
                and k not in keys | tables | refused] == []

    def test_config_reference_lists_only_keys_the_tree_has(self) -> None:
        """Every key row of config/README.md is a key the config tree generates, and back."""
        text = (ROOT / "config" / "README.md").read_text(encoding="utf-8")
        generated = {path for _, path, *_ in docfigures.config_rows()}
        assert _config_keys_listed(text) == generated


def _scenario_keys() -> set[str]:
    """Every leaf key of the scenario schema, dotted (a reference's periods as one key)."""
    schema = Scenario.model_json_schema()
    defs = schema["$defs"]

    def resolve(s: dict[str, Any]) -> dict[str, Any]:
        refs = [o for o in s.get("anyOf", ()) if "$ref" in o]
        s = refs[0] if refs else s
        return dict(defs[s["$ref"].rsplit("/", 1)[-1]]) if "$ref" in s else s

    def walk(node: dict[str, Any], prefix: str) -> set[str]:
        out: set[str] = set()
        for name, sub in resolve(node)["properties"].items():
            path = f"{prefix}.{name}" if prefix else name
            r = resolve(sub)
            if path == "references.periods":
                out.add(path)
            elif "properties" in r:
                out |= walk(r, path)
            elif r.get("type") == "array" and "$ref" in r.get("items", {}):
                out |= walk(r["items"], path)
            else:
                out.add(path)
        return out

    return walk(schema, "")


def test_scenario_table_lists_exactly_the_scenario_keys() -> None:
    """simulator/README.md's scenario-file table names every key the scenario model has."""
    text = (ROOT / "simulator" / "README.md").read_text(encoding="utf-8")
    section = text.split("## Scenario files")[1].split("\n## ")[0]
    documented: set[str] = set()
    for line in section.splitlines():
        if not line.startswith("| `"):
            continue
        cell = line.split("|")[1]
        table = re.match(r"\s*`\[+([\w.]+)\]+`", cell)
        names = re.findall(r"`([a-z_]+)`", cell[table.end():] if table else cell)
        documented |= {f"{table.group(1)}.{n}" if table else n for n in names}
    assert documented == _scenario_keys()


_FENCE = re.compile(r"^```.*?^```", re.MULTILINE | re.DOTALL)
_LINK = re.compile(r"\]\(([^)\s]+)\)")


def _prose(text: str) -> str:
    """The page without its fenced code blocks."""
    return _FENCE.sub("", text)


def _anchors(text: str) -> set[str]:
    """GitHub's anchors for the page's headings: lower case, punctuation dropped, - for space."""
    out = set()
    for heading in re.findall(r"^#+ (.+)$", _prose(text), flags=re.MULTILINE):
        slug = re.sub(r"[^\w\- ]", "", heading.strip().lower()).replace(" ", "-")
        out.add(slug)
    return out


def _broken(page: Path, target: str) -> bool:
    """Whether a relative link on ``page`` misses its file, leaves the repository, or its anchor."""
    path_part, _, anchor = target.partition("#")
    dest = (page.parent / path_part).resolve() if path_part else page
    if not dest.exists() or ROOT not in (dest, *dest.parents):
        return True
    return bool(anchor) and dest.suffix == ".md" and anchor not in _anchors(
        dest.read_text(encoding="utf-8"))


class TestLinksAndPaths:
    @pytest.mark.parametrize("page", PAGES, ids=lambda p: str(p.relative_to(ROOT)))
    def test_every_relative_link_resolves(self, page: Path) -> None:
        """Each relative link names a file or folder in the repository; its #anchor, a heading."""
        text = page.read_text(encoding="utf-8")
        links = [t for t in _LINK.findall(_prose(text)) if not re.match(r"[a-z]+:", t)]
        assert links, page
        assert [t for t in links if _broken(page, t)] == []

    def test_the_link_check_finds_a_broken_link_and_anchor(self) -> None:
        """A missing file, a link out of the repository and an unknown heading are reported."""
        readme = ROOT / "README.md"
        assert _broken(readme, "no-such-file.md")
        assert _broken(readme, "../outside.md")
        assert _broken(readme, "config/README.md#no-such-heading")
        assert not _broken(readme, "config/README.md#the-broker")
        assert not _broken(readme, "#on-real-data")

    @pytest.mark.parametrize("page", PAGES, ids=lambda p: str(p.relative_to(ROOT)))
    def test_every_repository_path_named_exists(self, page: Path) -> None:
        """Paths such as `daemon/trimtab/engine/engine.py` or `tests/sim/test_realdata.py` exist."""
        text = page.read_text(encoding="utf-8")
        named = re.findall(r"`((?:daemon|simulator|tests|config)/[^`\s*]+)`", text)
        assert named, page
        assert [p for p in named if not (ROOT / p.rstrip("/")).exists()] == []

    def test_the_module_map_lists_exactly_the_modules(self) -> None:
        """DEVELOPERS.md names every module of both packages once, and none that is gone."""
        text = (ROOT / "DEVELOPERS.md").read_text(encoding="utf-8")
        listed: set[str] = set()
        for table in re.findall(r"^\| module \(([^)]+)\) \|.*?\n((?:\|.*\n)+)", text,
                                flags=re.MULTILINE):
            base, rows = table
            for row in rows.splitlines()[1:]:
                first = row.split("|")[1]
                listed |= {base + name for name in re.findall(r"`([\w/*]+\.py)`", first)}
        actual: set[str] = set()
        for package in ("daemon/trimtab", "simulator/trimtab_sim"):
            for path in (ROOT / package).rglob("*.py"):
                rel = path.relative_to(ROOT).as_posix()
                if path.name == "__init__.py":
                    continue
                if rel.startswith("simulator/trimtab_sim/commands/"):
                    rel = "simulator/trimtab_sim/commands/*.py"
                actual.add(rel)
        assert listed == actual

"""Coefficient trajectories: each sensor's weights after every reference, with guard events.

The engine is deterministic, so replaying the stream through it with the daemon's config gives
exactly the models the daemon had (the demo checks the corrected values are bit-identical).
Weights are in engineering units (offset, then one coefficient per term), as `trimtab fit`
prints them; markers show rollbacks, accepted level shifts and gated or stuck references.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from trimtab.config import Config
from trimtab.engine.wiring import make_engine
from trimtab.messages import Reading, Reference

MARKED = ("rolled_back", "level_shift", "gated", "stuck")
"""Reference outcomes drawn as markers on the trajectory figure."""


@dataclass
class Trajectory:
    """One sensor's weights over time and the guard events along the way."""

    sensor: str
    names: list[str] = field(default_factory=list)
    t: list[float] = field(default_factory=list)
    weights: list[list[float]] = field(default_factory=list)
    events: list[tuple[float, str]] = field(default_factory=list)
    guard: dict[str, Any] = field(default_factory=dict)
    """The engine's figures at the end: rollbacks, α recoveries and α, band coverage."""


def trace(cfg: Config, events: Iterable[Reading | Reference]) -> dict[str, Trajectory]:
    """Replay ``events`` through a fresh engine; record weights after each reference."""
    engine = make_engine(cfg)
    out: dict[str, Trajectory] = {}
    for e in events:
        if isinstance(e, Reading):
            engine.process(e)
            continue
        for outcome in engine.on_reference(e):
            model = engine.model(outcome.sensor)
            if model is None:
                continue
            tr = out.setdefault(outcome.sensor, Trajectory(outcome.sensor))
            coefficients = model.coefficients()
            if not tr.names:
                tr.names = list(coefficients)
            tr.t.append(e.t)
            tr.weights.append(list(coefficients.values()))
            if outcome.status in MARKED:
                tr.events.append((e.t, outcome.status))
    stats = engine.stats()["sensors"]
    for sensor, tr in out.items():
        s = stats.get(sensor, {})
        tr.guard = {"rollbacks": s.get("rollbacks"), "recoveries": s.get("recoveries"),
                    "alpha": s.get("alpha"), "band_coverage": s.get("band_coverage")}
    return out


def draw(trajectories: dict[str, Trajectory], out_dir: Path) -> dict[str, str]:
    """One PNG per sensor: a panel per weight on UTC dates, guard events marked; file names."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    # marker shapes as well as colours, sized to be seen at a glance (not hairlines)
    styles = {"rolled_back": ("tab:red", "v", 46), "level_shift": ("tab:purple", "D", 34),
              "gated": ("tab:orange", "x", 30), "stuck": ("tab:brown", "s", 26)}
    files: dict[str, str] = {}
    for sensor, tr in sorted(trajectories.items()):
        if not tr.t:
            continue
        when = [datetime.fromtimestamp(t, UTC) for t in tr.t]
        n = len(tr.names)
        fig, axes = plt.subplots(n, 1, figsize=(11, 1.6 * n + 0.8), sharex=True, squeeze=False)
        for k, (ax, name) in enumerate(zip(axes[:, 0], tr.names, strict=True)):
            ys = [w[k] for w in tr.weights]
            ax.plot(when, ys, lw=1.0, color="tab:blue", zorder=2)
            ax.set_ylabel(name, fontsize=8)
            at = {t: y for t, y in zip(tr.t, ys, strict=True)}
            for status, (colour, marker, size) in styles.items():
                hits = [(datetime.fromtimestamp(t, UTC), at.get(t)) for t, s in tr.events
                        if s == status]
                if not hits:
                    continue
                xs = [x for x, _ in hits]
                ax.vlines(xs, 0, 1, transform=ax.get_xaxis_transform(), colors=colour,
                          lw=1.4, alpha=0.25, zorder=1)
                pts = [(x, y) for x, y in hits if y is not None]
                if pts:
                    ax.scatter([x for x, _ in pts], [y for _, y in pts], s=size, c=colour,
                               marker=marker, zorder=3,
                               label=status.replace("_", " ") if k == 0 else None)
        axes[0, 0].set_title(f"{sensor}: weights in engineering units after each reference")
        if tr.events:
            axes[0, 0].legend(loc="upper right", fontsize=7)
        axes[-1, 0].set_xlabel("date (UTC)")
        fig.autofmt_xdate()
        name = f"{sensor}-weights.png"
        fig.tight_layout()
        fig.savefig(out_dir / name, dpi=100)
        plt.close(fig)
        files[sensor] = name
    return files


def summary(trajectories: dict[str, Trajectory]) -> dict[str, Any]:
    """Counts of guard events and the final weights per sensor (for score.json)."""
    return {
        s: {"references": len(tr.t), "final": dict(zip(tr.names, tr.weights[-1], strict=True)),
            "events": {m: sum(1 for _, x in tr.events if x == m) for m in MARKED},
            "guard": tr.guard}
        for s, tr in sorted(trajectories.items()) if tr.t
    }

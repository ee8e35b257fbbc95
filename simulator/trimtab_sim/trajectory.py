"""Coefficient trajectories: each sensor's weights after every reference, with guard events.

The engine is deterministic, so replaying the stream through it with the daemon's config gives
exactly the models the daemon had (the demo checks the corrected values are bit-identical).
Weights are in engineering units (offset, then one coefficient per term), as `trimtab fit`
prints them; markers show rollbacks, accepted level shifts and gated or stuck references.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from trimtab.config import Config
from trimtab.messages import Reading, Reference
from trimtab.wiring import make_engine

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
    return out


def draw(trajectories: dict[str, Trajectory], out_dir: Path, t0: dict[str, float]
         ) -> dict[str, str]:
    """One PNG per sensor: a panel per weight, guard events marked; returns file names."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    colours = {"rolled_back": "tab:red", "level_shift": "tab:purple", "gated": "tab:orange",
               "stuck": "tab:brown"}
    files: dict[str, str] = {}
    for sensor, tr in sorted(trajectories.items()):
        if not tr.t:
            continue
        start = t0.get(sensor, tr.t[0])
        days = [(t - start) / 86400.0 for t in tr.t]
        n = len(tr.names)
        fig, axes = plt.subplots(n, 1, figsize=(11, 1.6 * n + 0.8), sharex=True, squeeze=False)
        for k, (ax, name) in enumerate(zip(axes[:, 0], tr.names, strict=True)):
            ax.plot(days, [w[k] for w in tr.weights], lw=0.9, color="tab:blue")
            ax.set_ylabel(name, fontsize=8)
            for status, colour in colours.items():
                xs = [(t - start) / 86400.0 for t, s in tr.events if s == status]
                if xs:
                    ax.vlines(xs, 0, 1, transform=ax.get_xaxis_transform(), colors=colour,
                              lw=0.6, alpha=0.6, label=status.replace("_", " ") if k == 0 else None)
        axes[0, 0].set_title(f"{sensor}: weights in engineering units after each reference")
        if tr.events:
            axes[0, 0].legend(loc="upper right", fontsize=7)
        axes[-1, 0].set_xlabel("days from first reading")
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
            "events": {m: sum(1 for _, x in tr.events if x == m) for m in MARKED}}
        for s, tr in sorted(trajectories.items()) if tr.t
    }

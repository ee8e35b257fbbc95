"""A PNG of the tuner's scores against α and λ (needs the optional ``plots`` extra: matplotlib).

Each point is one (α, λ) pair, coloured by the best tune RMSE any candidate with that pair
reached (the other tuned settings may vary); the recommended candidate is ringed. λ is on a
symmetric-log axis so that λ = 0 has a place.
"""

from __future__ import annotations

from pathlib import Path

from trimtab.errors import DataError
from trimtab.tune.tuner import TuneResult


def plot_scores(result: TuneResult, path: Path) -> None:
    """Write the plot to ``path``; DataError if matplotlib is missing or nothing was scored."""
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError:
        raise DataError("--plot needs matplotlib: pip install 'trimtab[plots]'") from None
    best: dict[tuple[float, float], float] = {}
    for o in result.outcomes:
        rmse = o.tune.rmse
        if rmse is None:
            continue
        key = (_number(o.candidate.settings["alpha"]), _number(o.candidate.settings["lambda"]))
        best[key] = min(rmse, best.get(key, rmse))
    if not best:
        raise DataError("--plot: no candidate was scored, nothing to plot")
    xs = [k[0] for k in best]
    ys = [k[1] for k in best]
    cs = list(best.values())
    fig, ax = plt.subplots(figsize=(7.0, 5.0), dpi=100)
    try:
        points = ax.scatter(xs, ys, c=cs, cmap="viridis_r", s=90, edgecolors="none")
        fig.colorbar(points, ax=ax, label=f"tune RMSE (against {result.against})")
        chosen = result.best
        if chosen is not None:
            ax.scatter([_number(chosen.candidate.settings["alpha"])],
                       [_number(chosen.candidate.settings["lambda"])],
                       s=260, facecolors="none", edgecolors="red", linewidths=2.0,
                       label="recommended")
            ax.legend(loc="best")
        ax.set_xscale("log")
        positive = [y for y in ys if y > 0.0]
        ax.set_yscale("symlog", linthresh=min(positive) if positive else 1.0)
        ax.set_xlabel("alpha (step size)")
        ax.set_ylabel("lambda (penalty toward the prior)")
        ax.set_title(f"trimtab tune: {len(result.outcomes)} candidates, "
                     f"{result.split:.0%} of the span tuned")
        ax.grid(True, which="both", alpha=0.3)
        fig.tight_layout()
        try:
            fig.savefig(path, format="png")
        except OSError as exc:
            raise DataError(f"{path}: cannot write the plot: {exc.strerror}") from exc
    finally:
        plt.close(fig)


def _number(v: object) -> float:
    """A tuned α or λ as a float (they are always numbers; 0 when unset)."""
    return float(v) if isinstance(v, int | float) else 0.0

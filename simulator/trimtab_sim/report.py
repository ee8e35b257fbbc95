"""The score report: a printed summary, report.md with an EPA target table, and PNG figures.

Figures need matplotlib (the ``plots`` extra), imported only when figures are drawn, with the
non-interactive Agg backend. Without it the Markdown report is still written and says so.
Coefficient trajectories (``trajectory.py``) are drawn when the daemon's config is given, by
replaying the stream through the same engine.
"""

from __future__ import annotations

import importlib.util
import math
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np

from trimtab_sim.score import DAY, F64, SERIES, Joined, Metrics, Result, metrics
from trimtab_sim.trajectory import Trajectory
from trimtab_sim.trajectory import draw as draw_trajectories

# US EPA performance targets for air sensors, QUOTED FROM MEMORY of EPA/600/R-20/280 (PM2.5,
# 24-hour averages) and EPA/600/R-20/279 (O3, 1-hour averages), base testing. They apply to
# the EPA's own field-test protocols (co-location beside regulatory monitors, base and
# enhanced testing), not to a simulated stream; meeting them here certifies nothing.
EPA_TARGETS: dict[str, dict[str, Any]] = {
    "pm25": {
        "document": "EPA/600/R-20/280",
        "quantity": "PM2.5",
        "unit": "µg/m³",
        "average": DAY,
        "r2_min": 0.70,
        "slope_tol": 0.35,
        "intercept_abs": 5.0,
        "rmse_max": 7.0,
        "nrmse_max": 0.30,
    },
    "o3": {
        "document": "EPA/600/R-20/279",
        "quantity": "O3",
        "unit": "ppb",
        "average": 3600.0,
        "r2_min": 0.80,
        "slope_tol": 0.20,
        "intercept_abs": 5.0,
        "rmse_max": 5.0,
        "nrmse_max": None,
    },
}
COMPLETENESS = 0.75  # share of readings an average needs to count (as the EPA protocols ask)


@dataclass(frozen=True, slots=True)
class TargetRow:
    """One target and whether each series' averaged values meet it."""

    metric: str
    target: str
    values: dict[str, float | None]
    met: dict[str, bool | None]


@dataclass(frozen=True, slots=True)
class TargetCheck:
    """One sensor's averaged series held against one EPA target set."""

    sensor: str
    key: str
    periods: int
    rows: list[TargetRow]


def block_means(t: F64, values: Sequence[F64], period: float) -> list[F64]:
    """Means over UTC-aligned blocks of ``period`` s that hold >= 75% of expected readings."""
    if t.size < 2:
        return [np.empty(0) for _ in values]
    expected = period / float(np.median(np.diff(t)))
    bins = np.floor(t / period).astype(np.int64)
    _, first, counts = np.unique(bins, return_index=True, return_counts=True)
    ok = counts >= COMPLETENESS * expected
    out = []
    for v in values:
        sums = np.add.reduceat(v, first)
        out.append(np.asarray((sums / counts)[ok], dtype=np.float64))
    return out


def check_targets(j: Joined, key: str) -> TargetCheck:
    """Averaged raw and corrected values of one sensor against the EPA set ``key``."""
    spec = EPA_TARGETS[key]
    names = ["raw", "corrected"]
    arrays = [j.series(n) for n in names]
    avg = block_means(j.t, [j.truth, *[a for a in arrays if a is not None]], spec["average"])
    truth, series = avg[0], dict(zip(names, avg[1:], strict=True))
    rows: dict[str, tuple[str, dict[str, float | None], dict[str, bool | None]]] = {}
    err_target = f"RMSE ≤ {spec['rmse_max']:g}" + (
        f" or NRMSE ≤ {100 * spec['nrmse_max']:g}%" if spec["nrmse_max"] else ""
    )
    labels = {
        "R²": f"≥ {spec['r2_min']:.2f}",
        "slope": f"1.0 ± {spec['slope_tol']:.2f}",
        "intercept": f"{-spec['intercept_abs']:g} ≤ b ≤ {spec['intercept_abs']:g}",
        "RMSE": err_target,
        "NRMSE": "(see RMSE)",
    }
    for label, target in labels.items():
        rows[label] = (target, {}, {})
    for name, v in series.items():
        m = metrics(v, truth) if truth.size >= 3 else None
        checks: dict[str, tuple[float | None, bool | None]] = {}
        if m is None:
            checks = {label: (None, None) for label in labels}
        else:
            err_ok = m.rmse <= spec["rmse_max"] or (
                spec["nrmse_max"] is not None and m.nrmse <= spec["nrmse_max"]
            )
            checks = {
                "R²": (m.fit_r2, m.fit_r2 >= spec["r2_min"]),
                "slope": (m.slope, abs(m.slope - 1.0) <= spec["slope_tol"]),
                "intercept": (m.intercept, abs(m.intercept) <= spec["intercept_abs"]),
                "RMSE": (m.rmse, err_ok),
                "NRMSE": (m.nrmse, None),
            }
        for label, (value, ok) in checks.items():
            rows[label][1][name] = value
            rows[label][2][name] = ok
    out = [TargetRow(label, tgt, vals, met) for label, (tgt, vals, met) in rows.items()]
    return TargetCheck(sensor=j.sensor, key=key, periods=int(truth.size), rows=out)


CAUTION = (
    "The target values are quoted from memory of EPA/600/R-20/280 (PM2.5) and "
    "EPA/600/R-20/279 (O3), not copied from the documents; check them against the documents "
    "before relying on them. They apply to the EPA's own test protocols (base and enhanced "
    "field and laboratory testing, beside regulatory monitors, on 24-hour averages for PM2.5 "
    "and 1-hour averages for O3), not to a simulated stream. A good score here is no "
    "certification: any health or safety use must defer to local regulations and accredited "
    "calibration practice. Precision targets (spread between identical sensors) are not "
    "evaluated."
)

_COLUMNS = ("n", "rmse", "mae", "bias", "r2", "slope", "intercept", "nrmse")
_HEAD = ("n", "RMSE", "MAE", "bias", "R²", "slope", "intercept", "NRMSE")


def _num(x: float | int | None, digits: int = 3) -> str:
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "–"
    if isinstance(x, int):
        return str(x)
    return f"{x:.{digits}g}" if abs(x) >= 1e4 or (x != 0 and abs(x) < 1e-3) else f"{x:.3f}"


def _pct(x: float | None) -> str:
    return "–" if x is None or not math.isfinite(x) else f"{100 * x:.1f}%"


def _metric_cells(m: Metrics) -> list[str]:
    return [_pct(m.nrmse) if c == "nrmse" else _num(getattr(m, c)) for c in _COLUMNS]


def improvement(res: Result) -> float | None:
    """1 − corrected RMSE / raw RMSE, pooled over all sensors."""
    m = res.overall.metrics
    if "raw" not in m or "corrected" not in m or m["raw"].rmse == 0:
        return None
    return 1.0 - m["corrected"].rmse / m["raw"].rmse


def summary_table(res: Result) -> str:
    """The plain-text summary printed by ``trimtab-sim score``."""
    head = ["sensor", "series", *_HEAD]
    rows = [head]
    for s in [*res.sensors, res.overall]:
        for name in SERIES:
            if name in s.metrics:
                rows.append([s.sensor, name, *_metric_cells(s.metrics[name])])
    widths = [max(len(r[i]) for r in rows) for i in range(len(head))]
    lines = [
        "  ".join(
            c.rjust(w) if i > 1 else c.ljust(w)
            for i, (c, w) in enumerate(zip(r, widths, strict=True))
        )
        for r in rows
    ]
    imp = improvement(res)
    if imp is not None:
        verdict = "meets" if imp >= res.settings.min_improvement else "misses"
        lines.append(
            f"corrected RMSE is {100 * imp:.1f}% below raw; {verdict} the required "
            f"{100 * res.settings.min_improvement:.0f}%"
        )
    cov = res.overall.coverage
    if cov is not None:
        lines.append(f"band coverage (|corrected − truth| ≤ band): {100 * cov:.1f}%")
    return "\n".join(lines)


def _md_table(head: Sequence[str], rows: Sequence[Sequence[str]]) -> list[str]:
    out = ["| " + " | ".join(head) + " |", "|" + "|".join("---" for _ in head) + "|"]
    out += ["| " + " | ".join(r) + " |" for r in rows]
    return out


def _target_cells(r: TargetRow, series: str) -> list[str]:
    value = r.values.get(series)
    return [_pct(value) if r.metric == "NRMSE" else _num(value), _yes(r.met.get(series))]


def _utc(t: float) -> str:
    return datetime.fromtimestamp(t, tz=UTC).strftime("%Y-%m-%d %H:%M")


def _yes(ok: bool | None) -> str:
    return "–" if ok is None else ("yes" if ok else "no")


def markdown(
    res: Result,
    targets: Sequence[TargetCheck],
    figures: dict[str, list[str]],
    sources: dict[str, str],
    plots_note: str | None,
    trajectories: dict[str, Trajectory] | None = None,
) -> str:
    """The text of report.md."""
    md = ["# trimtab-sim score report", ""]
    md += [f"- {k}: `{v}`" for k, v in sources.items()]
    md += ["", "## Accuracy against truth", ""]
    rows = []
    for s in [*res.sensors, res.overall]:
        for name in SERIES:
            if name in s.metrics:
                rows.append([s.sensor, name, *_metric_cells(s.metrics[name])])
    md += _md_table(["sensor", "series", *_HEAD], rows)
    md += [
        "",
        "RMSE, MAE and bias (mean of value − truth) are in the stream's units. R² here is "
        "1 − Σ(value − truth)² / Σ(truth − mean truth)², the value taken as a prediction of "
        "truth: it counts bias and gain error, and is negative when the value is worse than "
        "the mean. (The EPA table below uses the other R², that of the least-squares line "
        "of value against truth — the squared correlation — which ignores bias and gain, so "
        "a raw sensor can score 0.95 there and below 0 here.) Slope and intercept are those "
        "of that line. NRMSE = RMSE / mean truth. The oracle is a hindsight ridge fit "
        f"to every reference, refitted per {res.settings.oracle_days:g}-day block "
        f"(λ = {res.settings.oracle_lambda:g}); it bounds what a batch calibration could do.",
        "",
    ]
    imp = improvement(res)
    if imp is not None:
        verdict = "meets" if imp >= res.settings.min_improvement else "misses"
        md += [
            f"Pooled corrected RMSE is {100 * imp:.1f}% below raw: it {verdict} the required "
            f"margin of {100 * res.settings.min_improvement:.0f}%.",
            "",
        ]
    md += ["## Coverage and missing values", ""]
    md += _md_table(
        ["sensor", "scored readings", "without corrected value", "references", "band coverage"],
        [
            [
                s.sensor,
                str(s.n),
                str(s.missing),
                str(s.references),
                "–" if s.coverage is None else f"{100 * s.coverage:.1f}%",
            ]
            for s in [*res.sensors, res.overall]
        ],
    )
    if trajectories:
        md += ["", "## Guards", ""]
        md += ["What the daemon's guards did, replayed through its config: references gated "
               "as suspects, accepted level shifts, stuck references, rollbacks and the "
               "references after which α recovered toward its setting; the band's coverage "
               "of the references it was calibrated on.", ""]
        md += _md_table(
            ["sensor", "references", "gated", "level shifts", "stuck", "rollbacks",
             "α recoveries", "α at the end", "band coverage at references"],
            [[sensor, str(len(tr.t)),
              *(str(sum(1 for _, x in tr.events if x == m)) for m in
                ("gated", "level_shift", "stuck", "rolled_back")),
              str(tr.guard.get("recoveries", "–")), _num(tr.guard.get("alpha")),
              "–" if tr.guard.get("band_coverage") is None else
              f"{100 * tr.guard['band_coverage']:.1f}%"]
             for sensor, tr in sorted(trajectories.items()) if tr.t],
        )
    recs = [(s.sensor, r) for s in res.sensors for r in s.recovery]
    if recs:
        md += ["", "## Recovery after drift steps", ""]
        md += [
            f"Rolling RMS error over {res.settings.recovery_window:g} s after the step; "
            "recovered when a full window is within the tolerance (default 1.5 × the RMS "
            "error of the day before the step). Times are from the step to the end of that "
            "window.",
            "",
        ]
        md += _md_table(
            ["sensor", "step at (UTC)", "series", "tolerance", "time to recover"],
            [
                [
                    sensor,
                    _utc(r.at),
                    r.series,
                    _num(r.tolerance),
                    "never" if r.seconds is None else f"{r.seconds / 3600:.2f} h",
                ]
                for sensor, r in recs
            ],
        )
    if targets:
        md += ["", "## US EPA air-sensor targets (for orientation only)", "", CAUTION, ""]
        for tc in targets:
            spec = EPA_TARGETS[tc.key]
            md += [
                f"**{tc.sensor}** — {spec['quantity']}, {spec['document']}, "
                f"{spec['average'] / 3600:g}-hour averages ({tc.periods} complete periods), "
                f"units assumed {spec['unit']}.",
                "",
            ]
            md += _md_table(
                ["metric", "target", "raw", "met", "corrected", "met"],
                [
                    [r.metric, r.target, *_target_cells(r, "raw"), *_target_cells(r, "corrected")]
                    for r in tc.rows
                ],
            )
            md.append("")
    md += ["", "## Figures", ""]
    if plots_note:
        md += [plots_note, ""]
    for sensor, files in figures.items():
        md += [f"### {sensor}", ""] + [f"![{f}]({f})" for f in files] + [""]
    if not any(f.endswith("-weights.png") for fs in figures.values() for f in fs):
        md += [
            "Coefficient trajectories are drawn when the daemon's config is given "
            "(`trimtab-sim score --config CONFIG`).",
            "",
        ]
    return "\n".join(md)


def plots_available() -> bool:
    """True when matplotlib can be imported."""
    return importlib.util.find_spec("matplotlib") is not None


def _labelled(quantity: str, unit: str) -> str:
    return f"{quantity} ({unit})" if unit else quantity


def _dates(t: F64) -> Any:
    """Epoch seconds as numpy datetimes (UTC) for a time axis with real dates."""
    return (np.asarray(t) * 1e6).astype("datetime64[us]")


def _time_axis(ax: Any) -> None:
    import matplotlib.dates as mdates

    locator = mdates.AutoDateLocator()  # type: ignore[no-untyped-call]
    ax.xaxis.set_major_locator(locator)
    ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator))  # type: ignore[no-untyped-call]
    ax.set_xlabel("time (UTC)")


def series_figure(j: Joined, unit: str = "") -> Any:
    """Truth and corrected in front, the ± band shaded, references as marks, raw behind."""
    import matplotlib.pyplot as plt

    when = _dates(j.t)
    fig, ax = plt.subplots(figsize=(11, 4))
    ax.plot(when, j.inputs["raw"], lw=0.5, color="0.75", label="raw", zorder=1)
    ax.fill_between(when, j.corrected - j.band, j.corrected + j.band, color="tab:blue",
                    alpha=0.15, lw=0, label="± band", zorder=2)
    ax.plot(when, j.corrected, lw=0.9, color="tab:blue", label="corrected", zorder=3)
    ax.plot(when, j.truth, lw=0.9, color="black", label="truth", zorder=4)
    if j.ref_t.size:
        ax.plot(_dates(j.ref_t), j.ref_y, "o", ms=4, mfc="white", mec="tab:red", mew=1.2,
                label="reference", zorder=5)
    _time_axis(ax)
    ax.set_ylabel(_labelled("value", unit))
    ax.set_title(f"{j.sensor}: series")
    ax.legend(loc="upper right", fontsize=8, ncols=5)
    return fig


def scatter_figure(j: Joined, unit: str = "") -> Any:
    """Raw and corrected against truth, with the 1:1 line."""
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(5.5, 5.5))
    ax.plot(j.truth, j.inputs["raw"], ".", ms=1.5, color="0.7", label="raw")
    ax.plot(j.truth, j.corrected, ".", ms=1.5, color="tab:blue", label="corrected")
    lo = float(min(j.truth.min(), j.corrected.min()))
    hi = float(max(j.truth.max(), j.corrected.max()))
    ax.plot([lo, hi], [lo, hi], "k--", lw=1, label="1:1")
    ax.set(xlabel=_labelled("truth", unit), ylabel=_labelled("value", unit),
           title=f"{j.sensor}: against truth")
    ax.legend(loc="upper left", fontsize=8)
    return fig


def error_figure(j: Joined, unit: str = "") -> Any:
    """Raw and corrected error against truth over time, with the ± band."""
    import matplotlib.pyplot as plt

    when = _dates(j.t)
    fig, ax = plt.subplots(figsize=(11, 3.5))
    err = j.corrected - j.truth
    ax.fill_between(when, -j.band, j.band, color="tab:blue", alpha=0.15, lw=0, label="± band")
    ax.plot(when, j.inputs["raw"] - j.truth, lw=0.5, color="0.65", label="raw − truth")
    ax.plot(when, err, lw=0.6, color="tab:blue", label="corrected − truth")
    ax.axhline(0.0, color="black", lw=0.8)
    _time_axis(ax)
    ax.set_ylabel(_labelled("error", unit))
    ax.set_title(f"{j.sensor}: error")
    ax.legend(loc="upper right", fontsize=8)
    return fig


def draw_figures(joined: Sequence[Joined], out_dir: Path, unit: str = ""
                 ) -> dict[str, list[str]]:
    """Time series, scatter against truth and error over time, one PNG each per sensor.

    ``unit`` (the scenario's signal unit) labels every value axis; time axes show dates.
    """
    import matplotlib

    matplotlib.use("Agg")

    files: dict[str, list[str]] = {}
    for j in joined:
        files[j.sensor] = [
            _save(series_figure(j, unit), out_dir, f"{j.sensor}-series.png"),
            _save(scatter_figure(j, unit), out_dir, f"{j.sensor}-scatter.png"),
            _save(error_figure(j, unit), out_dir, f"{j.sensor}-error.png"),
        ]
    return files


def _save(fig: Any, out_dir: Path, name: str) -> str:
    import matplotlib.pyplot as plt

    fig.tight_layout()
    fig.savefig(out_dir / name, dpi=100)
    plt.close(fig)
    return name


def write_report(
    res: Result,
    joined: Sequence[Joined],
    targets: Sequence[TargetCheck],
    out_dir: Path,
    sources: dict[str, str],
    trajectories: dict[str, Trajectory] | None = None,
    unit: str = "",
) -> list[Path]:
    """Write report.md and the figures into ``out_dir``; returns the files written."""
    out_dir.mkdir(parents=True, exist_ok=True)
    figures: dict[str, list[str]] = {}
    note = None
    if plots_available():
        figures = draw_figures(joined, out_dir, unit)
        if trajectories:
            for sensor, name in draw_trajectories(trajectories, out_dir).items():
                figures.setdefault(sensor, []).append(name)
    else:
        note = "matplotlib is not installed (the 'plots' extra), so no figures were drawn."
    path = out_dir / "report.md"
    path.write_text(markdown(res, targets, figures, sources, note, trajectories),
                    encoding="utf-8")
    return [path, *(out_dir / f for fs in figures.values() for f in fs)]

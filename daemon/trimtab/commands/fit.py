"""``trimtab fit``: fit one sensor's model in closed form from collocation data.

DATA is a CSV file with a header row (one column per input, the reference column and the time
column), or a stream file (``.jsonl``) whose references are each paired with the sensor's
reading at or nearest before their time, within ``--tolerance`` seconds.
"""

from __future__ import annotations

import argparse
import bisect
import csv
import json
import math
from collections.abc import Iterator
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from typing import Any

import numpy as np

from trimtab.errors import DataError
from trimtab.messages import Reference
from trimtab.model.closedform import CVResult, FitReport, cross_validate, fit_model
from trimtab.model.terms import TermSpec
from trimtab.store.modelfile import save_model_file
from trimtab.wire.csvstream import parquet_rows, parse_number
from trimtab.wire.streamfile import read_events

AUTO_GRID = tuple(float(v) for v in np.logspace(-3, 3, 13))
"""λ values ``--lambda auto`` tries: 10⁻³ … 10³ in half-decades (standardised units)."""


@dataclass(slots=True)
class _Data:
    X: np.ndarray[Any, np.dtype[np.float64]]
    t: np.ndarray[Any, np.dtype[np.float64]]
    y: np.ndarray[Any, np.dtype[np.float64]]
    sensor: str | None
    dropped: int = 0
    u: np.ndarray[Any, np.dtype[np.float64]] | None = None


def add_arguments(p: argparse.ArgumentParser) -> None:
    """The options of ``trimtab fit``."""
    p.add_argument("data", metavar="DATA", help="CSV with a header row, or a .jsonl stream file")
    p.add_argument("-o", "--output", required=True, metavar="FILE",
                   help="where to write the model-state file (JSON, mode 0600)")
    p.add_argument("--inputs", default="raw", metavar="A,B,…",
                   help="input columns, the sensor's raw value first (default: raw)")
    p.add_argument("--reference", default="ref", metavar="COL",
                   help="CSV column holding the reference value (default: ref)")
    p.add_argument("--time", default="t", metavar="COL",
                   help="CSV column holding event time: epoch seconds or ISO 8601 with a zone "
                        "(default: t)")
    p.add_argument("--sensor", metavar="ID",
                   help="sensor id: picks the sensor in a stream file; recorded in the model file")
    p.add_argument("--products", default="", metavar="A*B,…", help="products of two inputs")
    p.add_argument("--squares", default="", metavar="A,…", help="inputs to square")
    p.add_argument("--elapsed", action="store_true",
                   help="add a linear drift term: days since the first reference")
    p.add_argument("--lambda", dest="lam", default=None, metavar="λ|auto",
                   help="ridge penalty in standardised units, or 'auto' to choose it by "
                        "time-blocked cross-validation (default: auto; 0 with --uncertainty)")
    p.add_argument("--uncertainty", default=None, metavar="COL",
                   help="CSV column holding each reference's standard uncertainty (same "
                        "units): fit by weighted least squares and print χ² (needs λ = 0)")
    p.add_argument("--precision", type=int, default=6, metavar="N",
                   help="significant digits of coefficients and uncertainties in the printed "
                        "report (default: 6; --json always gives every digit)")
    p.add_argument("--json", action="store_true",
                   help="print the report as one JSON object (full digits) instead of text")
    p.add_argument("--folds", type=int, default=5, metavar="N",
                   help="cross-validation blocks for --lambda auto (default: 5)")
    p.add_argument("--prior", default="factory", metavar="factory|zero|W0,W1,…",
                   help="what the penalty pulls toward: the factory calibration ŷ = raw, zero "
                        "weights (plain ridge), or the k + 1 weights in standardised units, "
                        "intercept first, as a config's prior = [...] gives them "
                        "(default: factory)")
    p.add_argument("--penalise-intercept", action="store_true",
                   help="penalise the intercept too (default: it is left free)")
    p.add_argument("--memory", type=float, default=None, metavar="M",
                   help="references the online penalty is scaled over (default: those fitted)")
    p.add_argument("--tolerance", type=float, default=300.0, metavar="SECONDS",
                   help="stream files: how far before a reference its reading may lie "
                        "(default: 300)")


def _prior_arg(text: str, spec: TermSpec) -> list[float] | None:
    """--prior: None for the factory calibration, else the k + 1 weights."""
    if text == "factory":
        return None
    if text == "zero":
        return [0.0] * (spec.n_terms + 1)
    try:
        weights = [float(v) for v in text.split(",")]
    except ValueError:
        raise DataError(f"--prior {text!r}: give factory, zero or comma-separated "
                        "numbers") from None
    if len(weights) != spec.n_terms + 1 or not all(math.isfinite(w) for w in weights):
        raise DataError(f"--prior {text!r}: the model {list(spec.names())} needs "
                        f"{spec.n_terms + 1} finite weights (intercept first)")
    return weights


def run(args: argparse.Namespace) -> int:
    """Fit, print the report, write the model file."""
    spec = TermSpec(
        inputs=_names(args.inputs, "--inputs"),
        products=tuple(_pair(s) for s in _names(args.products, "--products", allow_empty=True)),
        squares=_names(args.squares, "--squares", allow_empty=True),
        elapsed=args.elapsed,
    )
    if not 1 <= args.precision <= 17:
        raise DataError(f"--precision {args.precision}: give 1 to 17 significant digits")
    if args.lam is None:
        args.lam = "0" if args.uncertainty is not None else "auto"
    if args.uncertainty is not None and args.lam == "auto":
        raise DataError("--uncertainty fits by weighted least squares, which needs --lambda 0 "
                        "(not auto): a weighted ridge is not offered")
    path = Path(args.data)
    if path.suffix.lower() in (".jsonl", ".ndjson"):
        if args.uncertainty is not None:
            raise DataError(f"{path}: --uncertainty needs a CSV with that column; stream "
                            "files carry no reference uncertainties")
        data = _read_stream(path, spec, args.sensor, args.tolerance)
    else:
        data = _read_csv(path, spec, args.reference, args.time, args.uncertainty)
        data.sensor = args.sensor
    n = data.y.shape[0]
    if n == 0:
        raise DataError(f"{path}: no references to fit")
    prior = _prior_arg(args.prior, spec)
    cv: CVResult | None = None
    if args.lam == "auto":
        cv = cross_validate(spec, data.X, data.t, data.y, AUTO_GRID, folds=args.folds,
                            prior=prior, penalise_intercept=args.penalise_intercept)
        lam = cv.chosen
    else:
        lam = _lambda(args.lam)
        if data.u is not None and lam != 0.0:
            raise DataError(f"--uncertainty fits by weighted least squares, which needs "
                            f"--lambda 0, not {args.lam}: a weighted ridge is not offered")
    model, report = fit_model(spec, data.X, data.t, data.y, lam=lam, memory=args.memory,
                              prior=prior, penalise_intercept=args.penalise_intercept,
                              u_ref=data.u)
    fit_doc: dict[str, Any] = {**report.to_dict(), "data": str(path), "prior": args.prior}
    if cv is not None:
        fit_doc["cross_validation"] = cv.to_dict()
    save_model_file(args.output, model, sensor=data.sensor, fit=fit_doc)
    if args.json:
        doc = {**fit_doc, "sensor": data.sensor, "dropped": data.dropped,
               "output": str(args.output)}
        print(json.dumps(doc, indent=2, ensure_ascii=False, allow_nan=False))
    else:
        _print(path, data, spec, report, cv, args.output, args.precision)
    return 0


def _print(path: Path, data: _Data, spec: TermSpec, report: FitReport, cv: CVResult | None,
           output: str, digits: int = 6) -> None:
    head = f"trimtab fit: {path}, {report.n} references"
    if data.sensor:
        head += f", sensor {data.sensor}"
    print(head)
    if data.dropped:
        total = report.n + data.dropped
        print(f"  (dropped {data.dropped} of {total} references: no reading within the "
              "tolerance before them)")
    if cv is not None:
        print(f"λ by {cv.folds}-fold time-blocked cross-validation ({cv.scheme}):")
        print(f"  {'λ':>10}  {'CV RMSE':>12}")
        for lam, rmse in zip(cv.lams, cv.rmse, strict=True):
            mark = "  ← chosen" if lam == cv.chosen else ""
            print(f"  {lam:>10.4g}  {rmse:>12.6g}{mark}")
    g = f".{digits}g"
    width = max(17, digits + 8)
    unc = report.uncertainties
    head = f"  {'term':<20} {'coefficient':>{width}}"
    print(head + (f" {'std. uncertainty':>{width}}" if unc is not None else ""))
    for name, value in report.coefficients.items():
        label = f"gain ({name})" if name == spec.inputs[0] else name
        cell = f" {unc[name]:>{width}{g}}" if unc is not None else ""
        print(f"  {label:<20} {value:>{width}{g}}{cell}")
    if report.covariance is not None:
        print("covariance of the coefficients (engineering units, rows and columns in the "
              "order above):")
        names = list(report.coefficients)
        for name, row in zip(names, report.covariance, strict=True):
            print(f"  {name:<20}" + "".join(f" {v:>{width}{g}}" for v in row))
    print(f"uncertainties {report.uncertainty_basis}")
    dof = report.dof
    if report.chi2 is not None:
        print(f"χ²            {report.chi2:{g}}  on {dof} degrees of freedom (about {dof} if "
              "the stated uncertainties match the scatter)")
    sd = "n/a (n ≤ weights)" if report.residual_sd is None else f"{report.residual_sd:{g}}"
    print(f"residual SD   {sd}  (n − p = {dof})")
    print(f"RMSE          {report.rmse:{g}}")
    print(f"R²            {'n/a' if report.r2 is None else f'{report.r2:.{max(digits, 9)}f}'}")
    print(f"condition     {report.condition:.4g}  (standardised design)")
    print(f"n             {report.n}")
    print(f"λ             {report.lam:.4g}  (standardised units)")
    print(f"wrote {output}")


def _names(text: str, option: str, allow_empty: bool = False) -> tuple[str, ...]:
    names = tuple(s.strip() for s in text.split(",") if s.strip())
    if not names and not allow_empty:
        raise DataError(f"{option}: give at least one name")
    return names


def _pair(text: str) -> tuple[str, str]:
    parts = [s.strip() for s in text.split("*")]
    if len(parts) != 2 or not all(parts):
        raise DataError(f"--products: {text!r} is not of the form a*b")
    return parts[0], parts[1]


def _lambda(text: str) -> float:
    try:
        lam = float(text)
    except ValueError:
        raise DataError(f"--lambda: {text!r} is neither a number nor 'auto'") from None
    if not (math.isfinite(lam) and lam >= 0.0):
        raise DataError(f"--lambda: {lam} must be finite and ≥ 0")
    return lam


def parse_time(value: Any, where: str) -> float:
    """Epoch seconds from a number or an ISO 8601 string with a zone."""
    if isinstance(value, bool):
        raise DataError(f"{where}: time {value!r} is not epoch seconds or ISO 8601")
    is_number = isinstance(value, int | float)
    out = float(value) if is_number else _text_time(str(value).strip(), where)
    if not math.isfinite(out):
        raise DataError(f"{where}: time {out} is not finite")
    return out


def _text_time(text: str, where: str) -> float:
    try:
        return float(text)
    except ValueError:
        pass
    try:
        stamp = datetime.fromisoformat(text)
    except ValueError:
        raise DataError(f"{where}: time {text!r} is neither epoch seconds nor ISO 8601") from None
    if stamp.tzinfo is None:
        raise DataError(f"{where}: time {text!r} has no zone (add Z or ±hh:mm)")
    return stamp.timestamp()


def _read_csv(path: Path, spec: TermSpec, ref_col: str, time_col: str,
              u_col: str | None = None) -> _Data:
    """Collocation data from a CSV file (or a Parquet file, ``.parquet``): one row a reference."""
    rows_x: list[list[float]] = []
    ts: list[float] = []
    ys: list[float] = []
    us: list[float] = []
    header, rows = _table(path)
    col = {}
    for name in (*spec.inputs, ref_col, time_col, *((u_col,) if u_col else ())):
        if name not in header:
            raise DataError(f"{path}:1: no column {name!r} in the header (have {header})")
        col[name] = header.index(name)
    try:
        for line, row in rows:
            if not row or all(not c.strip() for c in row):
                continue
            if len(row) != len(header):
                raise DataError(
                    f"{path}:{line}: {len(row)} fields, the header has {len(header)}"
                )

            def at(name: str, line: int = line) -> str:
                return f"{path}:{line}: column {col[name] + 1} ({name!r})"

            rows_x.append([parse_number(row[col[n]], at(n)) for n in spec.inputs])
            ys.append(parse_number(row[col[ref_col]], at(ref_col)))
            ts.append(parse_time(row[col[time_col]], at(time_col)))
            if u_col:
                u = parse_number(row[col[u_col]], at(u_col))
                if not u > 0.0:
                    raise DataError(f"{at(u_col)}: uncertainty {u:g} must be > 0")
                us.append(u)
    except (csv.Error, UnicodeDecodeError) as exc:
        raise DataError(f"{path}: unreadable CSV ({exc})") from exc
    X = np.array(rows_x, dtype=np.float64).reshape(len(rows_x), len(spec.inputs))
    return _Data(X, np.array(ts, dtype=np.float64), np.array(ys, dtype=np.float64), None,
                 u=np.array(us, dtype=np.float64) if u_col else None)


def _table(path: Path) -> tuple[list[str], Iterator[tuple[int, list[str]]]]:
    """The header and numbered rows of a comma-separated file, or of a Parquet file."""
    if path.suffix.lower() == ".parquet":
        return parquet_rows(path)
    try:
        # utf-8-sig: a spreadsheet's byte-order mark must not become part of the first column
        text = path.read_text(encoding="utf-8-sig")
    except OSError as exc:
        raise DataError(f"{path}: cannot read ({exc.strerror})") from exc
    except UnicodeDecodeError as exc:
        raise DataError(f"{path}:1: unreadable header ({exc})") from exc
    reader = csv.reader(text.splitlines(keepends=True))
    try:
        header = [h.strip() for h in next(reader)]
    except StopIteration:
        raise DataError(f"{path}:1: empty file; expected a header row") from None
    except csv.Error as exc:
        raise DataError(f"{path}:1: unreadable header ({exc})") from exc

    def numbered() -> Iterator[tuple[int, list[str]]]:
        for row in reader:
            yield reader.line_num, row

    return header, numbered()


def _read_stream(path: Path, spec: TermSpec, sensor: str | None, tolerance: float) -> _Data:
    if not (math.isfinite(tolerance) and tolerance >= 0.0):
        raise DataError(f"--tolerance: {tolerance} must be finite and ≥ 0")
    readings: dict[str, list[tuple[float, list[float]]]] = {}
    refs: dict[str, list[tuple[float, float]]] = {}
    try:
        for ev in read_events(path):
            if sensor is not None and ev.sensor != sensor:
                continue
            if isinstance(ev, Reference):
                refs.setdefault(ev.sensor, []).append((ev.t, ev.value))
                continue
            missing = [name for name in spec.inputs if name not in ev.inputs]
            if missing:
                raise DataError(
                    f"{path}: reading of {ev.sensor} at t = {ev.t} has no input {missing[0]!r}"
                )
            vals = [float(ev.inputs[name]) for name in spec.inputs]
            readings.setdefault(ev.sensor, []).append((ev.t, vals))
    except OSError as exc:
        raise DataError(f"{path}: cannot read ({exc.strerror})") from exc
    if sensor is None:
        ids = sorted(set(readings) | set(refs))
        if len(ids) != 1:
            raise DataError(f"{path}: holds sensors {ids}; pick one with --sensor")
        sensor = ids[0]
    own = sorted(readings.get(sensor, []), key=lambda r: r[0])
    times = [r[0] for r in own]
    X, ts, ys, dropped = [], [], [], 0
    for t_ref, value in refs.get(sensor, []):
        k = bisect.bisect_right(times, t_ref) - 1
        if k < 0 or t_ref - times[k] > tolerance:
            dropped += 1
            continue
        X.append(own[k][1])
        ts.append(t_ref)
        ys.append(value)
    Xa = np.array(X, dtype=np.float64).reshape(len(X), len(spec.inputs))
    return _Data(Xa, np.array(ts), np.array(ys), sensor, dropped)

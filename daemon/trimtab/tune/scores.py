"""Prequential scores of K candidates, summed in stream order, and the scored candidates.

Each sum is accumulated in the order of the stream (``np.add.accumulate`` is sequential by
definition), so anyone can recompute it from a replay's output with a plain loop: per sensor
S = (…(0 + e_1²) + e_2²…), per part (tune, test) and per fold of the tune part.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Literal

import numpy as np
from numpy.typing import NDArray

from trimtab.tune.grid import Candidate

__all__ = ["Against", "Outcome", "Score", "Tally", "TuneResult", "seq_add"]

Against = Literal["truth", "references", "spans"]

F64 = NDArray[np.float64]
I64 = NDArray[np.int64]


@dataclass(frozen=True, slots=True)
class Score:
    """Sum of squared errors, sum of errors and their count, in stream order."""

    sse: float = 0.0
    total: float = 0.0
    n: int = 0

    @property
    def rmse(self) -> float | None:
        """√(sse / n), or None with no errors to score."""
        return math.sqrt(self.sse / self.n) if self.n else None

    @property
    def bias(self) -> float | None:
        """Mean error (corrected − truth, or prediction − reference), or None."""
        return self.total / self.n if self.n else None


def seq_add(acc: F64, parts: F64) -> F64:
    """acc + parts[:, 0] + parts[:, 1] + … in that order, per row (a K-vector of running sums)."""
    if parts.shape[1] == 0:
        return acc
    both = np.concatenate((acc[:, None], parts), axis=1)
    out: F64 = np.add.accumulate(both, axis=1)[:, -1]
    return out


class Tally:
    """K candidates' sums against references and against truth, per part and per fold."""

    def __init__(self, k: int, folds: int = 1) -> None:
        self.ref_w: I64 | None = None
        """Weights of the reference scores (``against = "spans"``), None: each counts once."""
        self.ref_sse = np.zeros((2, k))
        self.ref_sum = np.zeros((2, k))
        self.ref_n = np.zeros((2, k), dtype=np.int64)
        self.out_sse = np.zeros((2, k))
        self.out_sum = np.zeros((2, k))
        self.out_n = np.zeros(2, dtype=np.int64)
        # the same sums per fold of the tune part (rolling origin: each fold is predicted
        # from everything before it)
        self.fold_ref_sse = np.zeros((folds, k))
        self.fold_ref_n = np.zeros((folds, k), dtype=np.int64)
        self.fold_out_sse = np.zeros((folds, k))
        self.fold_out_n = np.zeros(folds, dtype=np.int64)

    def reference(self, i: int, r: F64, part: int, fold: int = -1) -> None:
        """Score reference ``i``'s prequential residuals (non-finite ones are not scored)."""
        fin = np.isfinite(r)
        sq = r * r
        if self.ref_w is not None:  # against spans: once per value the reference stands for
            w = int(self.ref_w[i])
            sq, rw = sq * w, r * w
        else:
            w, rw = 1, r
        self.ref_sse[part] = np.where(fin, self.ref_sse[part] + sq, self.ref_sse[part])
        self.ref_sum[part] = np.where(fin, self.ref_sum[part] + rw, self.ref_sum[part])
        self.ref_n[part] += fin * w
        if fold >= 0:
            self.fold_ref_sse[fold] = np.where(fin, self.fold_ref_sse[fold] + sq,
                                               self.fold_ref_sse[fold])
            self.fold_ref_n[fold] += fin * w

    def outputs(self, value: F64, truth: F64, part: NDArray[np.int8],
                fold: I64 | None = None) -> None:
        """Score a block of K × B corrected values against the readings' truth (NaN: none)."""
        has = ~np.isnan(truth)
        for p in (0, 1):
            cols = has & (part == p)
            if not cols.any():
                continue
            err = value[:, cols] - truth[cols][None, :]
            self.out_sse[p] = seq_add(self.out_sse[p], err * err)
            self.out_sum[p] = seq_add(self.out_sum[p], err)
            self.out_n[p] += int(cols.sum())
        if fold is None:
            return
        for f in np.unique(fold[has & (fold >= 0)]).tolist():
            cols = has & (fold == f)
            err = value[:, cols] - truth[cols][None, :]
            self.fold_out_sse[f] = seq_add(self.fold_out_sse[f], err * err)
            self.fold_out_n[f] += int(cols.sum())


@dataclass(slots=True)
class Outcome:
    """One evaluated candidate: scores, guard tallies and stability margins."""

    candidate: Candidate
    tune: Score
    test: Score
    per_sensor: dict[str, tuple[Score, Score]]
    rollbacks: int
    gated: int
    margin: float
    """Smallest step-stability margin (bound / actual) of stability.py over the config's sensor
    settings, evaluated at this candidate's α and λ (the largest it ever uses)."""
    reached: float
    """2 / the largest a·(λ/m + ‖φ‖²) of any step it took: how near the steps actually came."""
    folds: list[Score] = field(default_factory=list)
    """The tune part's score in each of its consecutive time blocks (rolling origin)."""

    def fold_spread(self) -> tuple[float, float] | None:
        """The smallest and largest fold RMSE, or None when no fold was scored."""
        got = [s.rmse for s in self.folds if s.rmse is not None]
        return (min(got), max(got)) if got else None


@dataclass(slots=True)
class TuneResult:
    """The ranked outcomes (best first), the refused candidates and what the run covered."""

    against: Against
    split: float
    split_t: float | None
    outcomes: list[Outcome]
    refused: list[Candidate]
    events: int
    complete: bool
    sensors: list[str] = field(default_factory=list)

    @property
    def best(self) -> Outcome | None:
        """The candidate with the lowest tune RMSE, if any was scored."""
        return self.outcomes[0] if self.outcomes and self.outcomes[0].tune.n else None

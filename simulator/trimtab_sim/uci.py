"""The UCI Air Quality year: a tin-oxide CO cell beside a reference analyser, and its schedules.

Data: ``tests/data/uci-air-quality`` (De Vito et al. 2008, UCI Machine Learning Repository,
doi:10.24432/C59K5F, CC BY 4.0; keep its source note beside any copy). Hourly, March 2004 –
April 2005: ``PT08.S1(CO)`` is the cell's raw response, ``T`` and ``RH`` its covariates,
``CO(GT)`` the analyser's CO in mg/m³; missing values are −200. Three reference schedules are
made by hiding references: every hour, one collocation day a week, one spot reference a day at
noon.
"""

from __future__ import annotations

import csv
import datetime as dt
from dataclasses import dataclass
from pathlib import Path

__all__ = ["DATA", "DAY", "FIT_DAYS", "SCHEDULES", "SENSOR", "TUNE_DAYS", "Hour", "Year",
           "load_year"]

SENSOR = "co-cell"
DAY = 86400.0
SCHEDULES = ("hourly", "weekly", "daily")
FIT_DAYS = 14.0
TUNE_DAYS = 90.0
MISSING = -200.0
DATA = (Path(__file__).resolve().parents[2] / "tests" / "data" / "uci-air-quality"
        / "AirQualityUCI.csv")


@dataclass(frozen=True, slots=True)
class Hour:
    """One hour of the cell: time, raw response, temperature, humidity and the analyser's CO."""

    t: float
    raw: float
    temp: float
    rh: float
    co: float | None


@dataclass(frozen=True, slots=True)
class Year:
    """The hours that have the cell's readings (in time order) and the schedule masks."""

    hours: list[Hour]

    @property
    def t0(self) -> float:
        return self.hours[0].t

    def day(self, h: Hour) -> int:
        """Days since the first reading's midnight."""
        first = dt.datetime.fromtimestamp(self.t0, dt.UTC).replace(hour=0, minute=0, second=0)
        return int((h.t - first.timestamp()) // DAY)

    def referenced(self, schedule: str, h: Hour) -> bool:
        """Whether the schedule gives a reference at this hour (only where the analyser has one)."""
        if h.co is None:
            return False
        if schedule == "hourly":
            return True
        if schedule == "weekly":
            return self.day(h) % 7 == 0
        if schedule == "daily":
            return dt.datetime.fromtimestamp(h.t, dt.UTC).hour == 12
        raise ValueError(f"unknown schedule {schedule!r}")


def load_year(path: Path = DATA) -> Year:
    """The UCI file's hours with the cell's readings (raw, T and RH all present)."""
    hours: list[Hour] = []
    with open(path, newline="", encoding="utf-8") as f:
        rows = csv.reader(f)
        head = next(rows)
        col = {name: i for i, name in enumerate(head)}
        for row in rows:
            if not row or not row[0]:
                continue
            when = dt.datetime.strptime(f"{row[0]} {row[1]}", "%Y/%m/%d %H:%M:%S")
            raw, temp, rh = (float(row[col[c]]) for c in ("PT08.S1(CO)", "T", "RH"))
            co = float(row[col["CO(GT)"]])
            if MISSING in (raw, temp, rh):
                continue
            hours.append(Hour(when.replace(tzinfo=dt.UTC).timestamp(), raw, temp, rh,
                              None if co == MISSING else co))
    return Year(hours)

"""Register + event log (+ readings) -> life-table rows. Pure functions, no I/O.

Inputs are already typed frames (see :mod:`wearcast.io.export`): dates are
``datetime64``, ids are text, kinds are one of ``failure``, ``replacement``,
``decommission``. Every input row carries ``_source`` and ``_line``; the
builder sorts each into exactly one of *kept*, *rejected* (with a reason) or
*after as_of* (only in as-of backtests), so the caller can prove that no row
was silently dropped.

Rules (ages in days):

* A unit is observed from ``max(install_date, records_start)`` until the first
  of its decommission date and ``as_of``. A unit installed before
  ``records_start`` enters late at its age on that date (delayed entry).
* ``replace``: a failure ends the life; the next life starts at age 0 on the
  failure date. ``repair``: the unit keeps its age; failures are recurrent
  events in counting-process rows that start at the previous event.
* A ``replacement`` right after a failure is the repair of that failure: the
  new life starts on the replacement date and the days in between are not at
  risk. A ``replacement`` not preceded by a failure is a planned renewal: the
  life ends as a suspension and a new life starts at age 0.
* Events dated on or before ``records_start`` are kept: they move the start of
  the life in progress (``replace``), but lives that ended before records
  began are not observed, so those failures are not rows.
* Readings split rows at their dates; a piece ``(a, b]`` takes the latest
  reading dated on or before ``a`` (last value carried forward) and, before
  the first reading, the first reading's value. A unit with no readings has
  NaN for reading covariates.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

DAY = pd.Timedelta(days=1)
KIND_ORDER = {"failure": 0, "replacement": 1, "decommission": 2}


@dataclass(frozen=True)
class BuildSettings:
    renewal: str  # "replace" or "repair"
    as_of: pd.Timestamp
    records_start: pd.Timestamp | None = None
    backtest: bool = False  # as_of given as an override: later records are "after as_of", not errors
    reading_columns: tuple[str, ...] = ()
    register_columns: tuple[str, ...] = ()  # static covariates and group columns copied to rows


@dataclass
class BuildOutcome:
    """Rows of the life table plus where every input row went."""

    frame: pd.DataFrame
    rejected: list[tuple[str, int, str, str, str]] = field(default_factory=list)  # source, line, column, value, reason
    after_as_of: set[tuple[str, int]] = field(default_factory=set)
    kept: set[tuple[str, int]] = field(default_factory=set)

    def reject(self, row, column: str, value, reason: str) -> None:
        self.rejected.append((str(row["_source"]), int(row["_line"]), column, str(value), reason))


def _key(row) -> tuple[str, int]:
    return (str(row["_source"]), int(row["_line"]))


def _day(ts) -> str:
    return "" if pd.isna(ts) else pd.Timestamp(ts).strftime("%Y-%m-%d")


def build_register_log(register: pd.DataFrame, events: pd.DataFrame, readings: pd.DataFrame | None,
                       settings: BuildSettings) -> BuildOutcome:
    """Turn typed register/events/readings frames into life-table rows.

    ``register``: unit_id, install_date, decommission_date (NaT when none) and
    ``settings.register_columns``. ``events``: unit_id, event_date, event_kind,
    failure_mode. ``readings``: unit_id, reading_date and
    ``settings.reading_columns`` (float). Each unit id appears once in the
    register and every event/reading unit is in it (the caller checks both).
    Returns a :class:`BuildOutcome` whose ``frame`` has the life-table columns
    (ages in days) plus install_date, entry_date, exit_date and register columns.
    """
    out = BuildOutcome(frame=pd.DataFrame())
    as_of = settings.as_of
    units: dict[str, dict] = {}
    install_of = dict(zip(register["unit_id"], register["install_date"]))
    for row in register.sort_values(["unit_id"], kind="mergesort").to_dict("records"):
        install, decom = row["install_date"], row["decommission_date"]
        if install > as_of:
            if settings.backtest:
                out.after_as_of.add(_key(row))
            else:
                out.reject(row, "install_date", _day(install), "installed after as_of")
            continue
        if settings.backtest and pd.notna(decom) and decom > as_of:
            decom = pd.NaT  # not yet recorded on the as_of date
        if pd.notna(decom) and decom <= install:
            out.reject(row, "decommission_date", _day(decom), "decommission not after install (zero or negative duration)")
            continue
        out.kept.add(_key(row))
        units[row["unit_id"]] = {"row": row, "install": install, "end": decom, "events": [], "readings": []}
    dropped_units = set(register["unit_id"]) - set(units)

    def _sort_in(frame, date_col, target):
        if frame is None or frame.empty:
            return
        order = frame.assign(_rank=frame.get("event_kind", pd.Series("", index=frame.index)).map(KIND_ORDER).fillna(0))
        # Same-date rows are ordered by their contents, never by file position, so the
        # row that wins (and the one quarantined as a repeat) does not depend on row order.
        sort_cols = ["unit_id", date_col, "_rank"] + (["failure_mode"] if "failure_mode" in frame else []) \
            + [c for c in settings.reading_columns if c in frame]
        for row in order.sort_values(sort_cols + ["_source", "_line"], kind="mergesort").to_dict("records"):
            uid, when = row["unit_id"], row[date_col]
            if uid in dropped_units:
                # The unit's register row was rejected or lies after as_of: follow it.
                if settings.backtest and install_of[uid] > as_of:
                    out.after_as_of.add(_key(row))
                else:
                    out.reject(row, "unit_id", uid, "unit's register row was rejected")
                continue
            if when > as_of:
                if settings.backtest:
                    out.after_as_of.add(_key(row))
                else:
                    out.reject(row, date_col, _day(when), "dated after as_of")
                continue
            if when < units[uid]["install"]:
                out.reject(row, date_col, _day(when), "dated before install")
                continue
            units[uid][target].append(row)

    _sort_in(events, "event_date", "events")
    _sort_in(readings, "reading_date", "readings")

    pieces = []
    for uid in sorted(units):
        pieces.extend(_unit_rows(units[uid], settings, out))
    columns = ["unit_id", "life", "entry_age", "exit_age", "failed", "mode", "in_service",
               "install_date", "entry_date", "exit_date", *settings.register_columns, *settings.reading_columns]
    frame = pd.DataFrame(pieces, columns=columns)
    frame["failed"] = frame["failed"].astype(bool)
    frame["in_service"] = frame["in_service"].astype(bool)
    out.frame = frame
    return out


def _unit_rows(unit: dict, s: BuildSettings, out: BuildOutcome) -> list[list]:
    install = unit["install"]
    # The first decommission (register column or log event) ends observation.
    decom_events = []
    for r in unit["events"]:
        if r["event_kind"] == "decommission" and r["event_date"] <= install:
            out.reject(r, "event_date", _day(r["event_date"]), "event on the install date (zero duration)")
        elif r["event_kind"] == "decommission":
            decom_events.append(r)
    unit["events"] = [r for r in unit["events"] if r["event_kind"] != "decommission" or r["event_date"] > install]
    end_decom = unit["end"]
    if decom_events:
        first = decom_events[0]["event_date"]
        end_decom = first if pd.isna(end_decom) else min(end_decom, first)
    end = s.as_of if pd.isna(end_decom) else min(end_decom, s.as_of)
    decommissioned = pd.notna(end_decom) and end_decom <= s.as_of

    segments = []  # life, life_start, start, stop, failed, mode
    life, life_start, row_start, prev = 1, install, install, install
    awaiting = False
    seen_decommission = False
    for r in unit["events"]:
        d, kind = r["event_date"], r["event_kind"]
        if d > end:
            out.reject(r, "event_date", _day(d), "dated after decommission")
            continue
        if kind == "decommission":
            if seen_decommission:
                out.reject(r, "event_kind", kind, "second decommission of the unit")
            else:
                seen_decommission = True
                out.kept.add(_key(r))
            continue
        repair_of_failure = kind == "replacement" and awaiting and d == prev
        if d <= prev and not repair_of_failure:
            reason = "event on the install date (zero duration)" if d == install and prev == install \
                else "event before or on the previous event's date (zero or negative duration)"
            out.reject(r, "event_date", _day(d), reason)
            continue
        if kind == "failure":
            segments.append((life, life_start, row_start, d, True, str(r.get("failure_mode", ""))))
            if s.renewal == "replace":
                life, life_start = life + 1, d
            row_start, awaiting = d, True
        elif awaiting:  # replacement right after a failure: downtime is not at risk
            if s.renewal == "repair":
                life += 1
            life_start, row_start, awaiting = d, d, False
        else:  # planned renewal: the life ends as a suspension
            segments.append((life, life_start, row_start, d, False, ""))
            life, life_start, row_start = life + 1, d, d
        prev = d
        out.kept.add(_key(r))
    open_segment = row_start < end
    if open_segment:
        segments.append((life, life_start, row_start, end, False, ""))

    readings = []
    for r in unit["readings"]:
        if r["reading_date"] > end:
            out.reject(r, "reading_date", _day(r["reading_date"]), "dated after decommission")
        elif readings and r["reading_date"] == readings[-1]["reading_date"]:
            out.reject(r, "reading_date", _day(r["reading_date"]), "second reading of the unit on the same date")
        else:
            readings.append(r)
            out.kept.add(_key(r))
    reading_dates = np.array([r["reading_date"] for r in readings], dtype="datetime64[ns]")
    if s.reading_columns:
        values = _carry_forward(np.array([[r[c] for c in s.reading_columns] for r in readings],
                                         dtype=float).reshape(len(readings), len(s.reading_columns)))
    static = [unit["row"][c] for c in s.register_columns]
    obs_start = install if s.records_start is None else max(install, s.records_start)
    uid = unit["row"]["unit_id"]
    rows = []
    for k, (lf, ls, a, b, failed, mode) in enumerate(segments):
        a = max(a, obs_start)
        if b <= a:
            continue  # ended before records began: not observed
        lo = int(np.searchsorted(reading_dates, np.datetime64(a), side="right"))
        hi = int(np.searchsorted(reading_dates, np.datetime64(b), side="left"))
        cuts = [a] + [pd.Timestamp(t) for t in reading_dates[lo:hi]] + [b]
        last_seg = open_segment and k == len(segments) - 1
        for j in range(len(cuts) - 1):
            p, q = cuts[j], cuts[j + 1]
            final = j == len(cuts) - 2
            row = [uid, lf, (p - ls) / DAY, (q - ls) / DAY, failed and final, mode if final else "",
                   bool(last_seg and final and not decommissioned), install, p, q, *static]
            if s.reading_columns:
                if len(reading_dates):
                    idx = max(int(np.searchsorted(reading_dates, np.datetime64(p), side="right")) - 1, 0)
                    row.extend(values[idx].tolist())
                else:
                    row.extend([np.nan] * len(s.reading_columns))
            rows.append(row)
    return rows


def _carry_forward(values: np.ndarray) -> np.ndarray:
    """Fill NaN down each column (last value carried forward), then up (first value backward).

    ``values``: shape (n_readings, n_columns), readings in date order.
    """
    if not np.isnan(values).any():
        return values
    return pd.DataFrame(values).ffill().bfill().to_numpy()


def build_from_intervals(rows: pd.DataFrame, settings: BuildSettings, *, dated: bool) -> BuildOutcome:
    """Check typed life-table rows (shape ``life_table``) and mark in-service rows.

    ``rows``: unit_id, life, entry_age, exit_age (days), failed, mode, extra
    columns; when ``dated``, also install_date, entry_date, exit_date. Rejects
    negative entry ages, zero or negative durations and intervals that overlap
    an earlier interval of the same life. In a backtest (dated only) rows that
    start after ``as_of`` are set aside and rows spanning it end there as
    suspensions. A unit's last row, when not a failure, is in service (dated:
    only when it ends on ``as_of``).
    """
    out = BuildOutcome(frame=pd.DataFrame())
    frame = rows.copy()
    if dated and settings.backtest:
        later = (frame["entry_date"] >= settings.as_of).to_numpy()
        for r in frame[later].to_dict("records"):
            out.after_as_of.add(_key(r))
        frame = frame[~later].copy()
        cut = frame["exit_date"] > settings.as_of
        frame.loc[cut, "exit_date"] = settings.as_of
        frame.loc[cut, "exit_age"] = (settings.as_of - frame.loc[cut, "install_date"]) / DAY
        frame.loc[cut, "failed"] = False
        frame.loc[cut, "mode"] = ""
    negative = frame["entry_age"] < 0
    for r in frame[negative].to_dict("records"):
        out.reject(r, "entry", r["entry_age"], "negative entry age")
    frame = frame[~negative]
    short = frame["exit_age"] <= frame["entry_age"]
    for r in frame[short].to_dict("records"):
        out.reject(r, "exit", r["exit_age"], "exit not after entry (zero or negative duration)")
    frame = frame[~short]
    order = frame.sort_values(["unit_id", "life", "entry_age", "exit_age", "failed", "mode", "_source", "_line"],
                              kind="mergesort")
    keep = np.ones(len(order), dtype=bool)
    last_key, last_exit = None, -np.inf
    for i, (uid, lf, entry, exit_) in enumerate(zip(order["unit_id"], order["life"],
                                                     order["entry_age"], order["exit_age"])):
        if (uid, lf) != last_key:
            last_key, last_exit = (uid, lf), -np.inf
        if entry < last_exit:
            keep[i] = False
            out.reject(order.iloc[i].to_dict(), "entry", entry, "interval overlaps another interval of the same life")
            continue
        last_exit = exit_
    frame = order[keep].copy()
    out.kept.update(zip(frame["_source"].astype(str), frame["_line"].astype(int)))
    last = frame.groupby(["unit_id", "life"], sort=False)["exit_age"].transform("max") == frame["exit_age"]
    top_life = frame.groupby("unit_id", sort=False)["life"].transform("max") == frame["life"]
    in_service = last & top_life & ~frame["failed"].astype(bool)
    if dated:
        in_service &= frame["exit_date"] == settings.as_of
    frame["in_service"] = in_service.to_numpy()
    out.frame = frame.drop(columns=[c for c in ("_source", "_line", "_raw", "_malformed") if c in frame])
    return out

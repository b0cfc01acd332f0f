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
    """Rows of the life table plus where every input row went.

    Rows are named by their file (``_source``) and index label (the row's
    position in that file's raw table). ``rejected`` holds tuples
    ``(source, index, column, values, reason)`` where ``column``/``reason`` are
    one string or arrays aligned with ``index``; ``kept`` and ``after_as_of``
    hold ``(source, index)`` pairs.
    """

    frame: pd.DataFrame
    rejected: list = field(default_factory=list)
    after_as_of: list = field(default_factory=list)
    kept: list = field(default_factory=list)
    ordered: bool = False  # frame already sorted by unit_id, life, entry_age

    def reject(self, source: str, index: np.ndarray, column, values, reason) -> None:
        if len(index):
            self.rejected.append((source, np.asarray(index), column, np.asarray(values, dtype=object), reason))

    def set_aside(self, source: str, index: np.ndarray) -> None:
        if len(index):
            self.after_as_of.append((source, np.asarray(index)))

    def keep(self, source: str, index: np.ndarray) -> None:
        if len(index):
            self.kept.append((source, np.asarray(index)))

    @property
    def n_kept(self) -> int:
        return int(sum(len(i) for _, i in self.kept))

    @property
    def n_after_as_of(self) -> int:
        return int(sum(len(i) for _, i in self.after_as_of))


def _day(ts) -> str:
    return "" if pd.isna(ts) else pd.Timestamp(ts).strftime("%Y-%m-%d")


def _days(values) -> list[str]:
    return [_day(t) for t in np.asarray(values)]


def _source(frame: pd.DataFrame) -> str:
    return str(frame["_source"].iloc[0]) if len(frame) else ""


def _codes_in(values: pd.Series, ids: pd.Index) -> np.ndarray:
    """Position of each value in ``ids`` (-1 when absent), looked up once per distinct value."""
    if isinstance(values.dtype, pd.CategoricalDtype):
        table = ids.get_indexer(values.cat.categories)
        codes = values.cat.codes.to_numpy()
        return np.where(codes < 0, -1, table[np.maximum(codes, 0)])
    return ids.get_indexer(values.to_numpy(dtype=object))


def _ns(values) -> np.ndarray:
    return np.asarray(values, dtype="datetime64[ns]")


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

    Whole-column work (sorts, masks, searchsorted); only the event log is
    walked row by row, because each event's meaning depends on the one before.
    """
    out = BuildOutcome(frame=pd.DataFrame())
    as_of = np.datetime64(pd.Timestamp(settings.as_of).to_datetime64(), "ns")
    nat = np.datetime64("NaT", "ns")
    src = _source(register)
    reg_index = register.index.to_numpy()
    reg_ids = np.asarray(register["unit_id"], dtype=object)
    ids = pd.Index(reg_ids).sort_values()  # unit codes follow the text order of the ids
    n_units = len(ids)
    unit_row = np.empty(n_units, dtype=np.int64)
    unit_row[ids.get_indexer(reg_ids)] = np.arange(len(reg_ids))
    install = _ns(register["install_date"])[unit_row]
    decom = _ns(register["decommission_date"])[unit_row]
    reg_pos = reg_index[unit_row]

    late = install > as_of
    if settings.backtest:
        out.set_aside(src, reg_pos[late])
        decom = np.where(~late & (decom > as_of), nat, decom)  # not yet recorded on the as_of date
    else:
        out.reject(src, reg_pos[late], "install_date", _days(install[late]), "installed after as_of")
    bad = ~late & ~np.isnat(decom) & (decom <= install)
    out.reject(src, reg_pos[bad], "decommission_date", _days(decom[bad]),
               "decommission not after install (zero or negative duration)")
    unit_ok = ~late & ~bad
    out.keep(src, reg_pos[unit_ok])

    ev = _sorted_log(events, "event_date", settings, ids, install, unit_ok, as_of, out)
    rd = _sorted_log(readings, "reading_date", settings, ids, install, unit_ok, as_of, out)

    # -- events: the first decommission (register column or log) ends observation --
    if ev is None:
        ev = {"code": np.zeros(0, np.int64), "date": np.zeros(0, "datetime64[ns]"), "index": np.zeros(0, np.int64),
              "kind": np.zeros(0, object), "mode": np.zeros(0, object), "source": ""}
    is_decom = ev["kind"] == "decommission"
    at_install = is_decom & (ev["date"] <= install[ev["code"]])
    out.reject(ev["source"], ev["index"][at_install], "event_date", _days(ev["date"][at_install]),
               "event on the install date (zero duration)")
    ev = {k: (v[~at_install] if isinstance(v, np.ndarray) else v) for k, v in ev.items()}
    is_decom = ev["kind"] == "decommission"
    first_decom = np.full(n_units, nat)
    dec_codes, first = np.unique(ev["code"][is_decom], return_index=True)
    first_decom[dec_codes] = ev["date"][is_decom][first]  # log sorted by unit, then date
    end_decom = np.where(np.isnat(decom), first_decom,
                         np.where(np.isnat(first_decom), decom, np.minimum(decom, first_decom)))
    end = np.where(np.isnat(end_decom), as_of, np.minimum(end_decom, as_of))
    decommissioned = ~np.isnat(end_decom) & (end_decom <= as_of)

    segments, status = _walk_events(ev, install, end, settings.renewal)
    for code, column, reason in ((1, "event_date", "dated after decommission"),
                                 (2, "event_kind", "second decommission of the unit"),
                                 (3, "event_date", "event on the install date (zero duration)"),
                                 (4, "event_date",
                                  "event before or on the previous event's date (zero or negative duration)")):
        hit = status == code
        values = ev["kind"][hit] if column == "event_kind" else _days(ev["date"][hit])
        out.reject(ev["source"], ev["index"][hit], column, values, reason)
    out.keep(ev["source"], ev["index"][status == 0])

    # Units with no event left: one open segment from install to the end.
    quiet = unit_ok.copy()
    quiet[ev["code"]] = False
    quiet &= install < end
    q_codes = np.flatnonzero(quiet)
    seg = {k: np.concatenate([segments[k], v]) for k, v in {
        "code": q_codes, "life": np.ones(len(q_codes), np.int64), "life_start": install[q_codes],
        "start": install[q_codes], "stop": end[q_codes], "failed": np.zeros(len(q_codes), bool),
        "mode": np.full(len(q_codes), "", dtype=object), "open": np.ones(len(q_codes), bool)}.items()}
    order = np.argsort(seg["code"], kind="stable")
    seg = {k: v[order] for k, v in seg.items()}

    # -- readings: one per unit and date, up to the end; last value carried forward --
    n_cols = len(settings.reading_columns)
    if rd is None:
        rd = {"code": np.zeros(0, np.int64), "date": np.zeros(0, "datetime64[ns]"), "index": np.zeros(0, np.int64),
              "values": np.zeros((0, n_cols)), "source": ""}
    after_end = rd["date"] > end[rd["code"]]
    out.reject(rd["source"], rd["index"][after_end], "reading_date", _days(rd["date"][after_end]),
               "dated after decommission")
    rd = {k: (v[~after_end] if isinstance(v, np.ndarray) else v) for k, v in rd.items()}
    repeat = np.zeros(len(rd["code"]), dtype=bool)
    repeat[1:] = (rd["code"][1:] == rd["code"][:-1]) & (rd["date"][1:] == rd["date"][:-1])
    out.reject(rd["source"], rd["index"][repeat], "reading_date", _days(rd["date"][repeat]),
               "second reading of the unit on the same date")
    rd = {k: (v[~repeat] if isinstance(v, np.ndarray) else v) for k, v in rd.items()}
    out.keep(rd["source"], rd["index"])
    values = rd["values"]
    if n_cols and np.isnan(values).any():
        filled = pd.DataFrame(values).groupby(rd["code"], sort=False).ffill()
        values = filled.groupby(rd["code"], sort=False).bfill().to_numpy()

    out.frame, out.ordered = _pieces(seg, rd["code"], rd["date"], values, register, unit_row, ids, install,
                                     decommissioned, settings)
    return out


def _sorted_log(frame: pd.DataFrame | None, date_col: str, settings: BuildSettings, ids: pd.Index,
                install: np.ndarray, unit_ok: np.ndarray, as_of, out: BuildOutcome) -> dict | None:
    """Sort an event log or readings table; set aside or reject rows that cannot be placed.

    Returns the remaining rows as arrays in (unit, date, kind, contents) order.
    """
    if frame is None or frame.empty:
        return None
    src = _source(frame)
    code = _codes_in(frame["unit_id"], ids)
    when = _ns(frame[date_col])
    # Same-date rows are ordered by their contents, never by file position, so the
    # row that wins (and the one quarantined as a repeat) does not depend on row order.
    # Keys, most significant first: unit, date, kind rank, failure mode, readings, line.
    order = _grouped_order(code, when.view(np.int64))
    if order is None:
        order = np.lexsort((when.view(np.int64), code))
    c, w = code[order], when[order]
    if ((c[1:] == c[:-1]) & (w[1:] == w[:-1])).any():  # ties on (unit, date): use every key
        keys = [code, when.view(np.int64)]
        if "event_kind" in frame:
            keys.append(frame["event_kind"].map(KIND_ORDER).fillna(0).to_numpy(dtype=float))
        if "failure_mode" in frame:
            keys.append(pd.factorize(np.asarray(frame["failure_mode"], dtype=object), sort=True)[0])
        keys += [frame[c].to_numpy(dtype=float) for c in settings.reading_columns if c in frame]
        keys.append(frame["_line"].to_numpy())
        order = np.lexsort(keys[::-1])
    code = code[order]
    when = when[order]
    index = frame.index.to_numpy()[order]
    if (code < 0).any():
        raise ValueError("a log row's unit is not in the register; the caller must check this")
    dropped = ~unit_ok[code]
    # The unit's register row was rejected or lies after as_of: follow it.
    aside = dropped & (install[code] > as_of) if settings.backtest else np.zeros(len(code), bool)
    out.set_aside(src, index[aside])
    gone = dropped & ~aside
    out.reject(src, index[gone], "unit_id", ids.to_numpy()[code[gone]], "unit's register row was rejected")
    later = ~dropped & (when > as_of)
    if settings.backtest:
        out.set_aside(src, index[later])
    else:
        out.reject(src, index[later], date_col, _days(when[later]), "dated after as_of")
    early = ~dropped & ~later & (when < install[code])
    out.reject(src, index[early], date_col, _days(when[early]), "dated before install")
    live = ~dropped & ~later & ~early
    rows = {"code": code[live], "date": when[live], "index": index[live], "source": src}
    if "event_kind" in frame:
        rows["kind"] = np.asarray(frame["event_kind"], dtype=object)[order][live]
        rows["mode"] = np.asarray(frame["failure_mode"], dtype=object)[order][live]
    else:
        cols = settings.reading_columns
        rows["values"] = np.column_stack([frame[c].to_numpy(dtype=float)[order][live] for c in cols]) \
            if cols else np.zeros((int(live.sum()), 0))
    return rows


def _grouped_order(code: np.ndarray, when: np.ndarray) -> np.ndarray | None:
    """The (unit, date) sort order in linear time when the file already lists each unit's
    rows together in date order (the usual export); None when it does not."""
    n = len(code)
    if n < 2:
        return np.arange(n)
    same = code[1:] == code[:-1]
    if not (when[1:] > when[:-1])[same].all():
        return None
    change = np.flatnonzero(~same) + 1
    starts = np.concatenate(([0], change))
    heads = code[starts]
    runs = np.argsort(heads, kind="stable")
    if (heads[runs][1:] == heads[runs][:-1]).any():
        return None  # a unit's rows are split over several runs
    lengths = np.diff(np.append(starts, n))[runs]
    shift = starts[runs] - (np.cumsum(lengths) - lengths)
    return np.arange(n) + np.repeat(shift, lengths)


def _walk_events(ev: dict, install: np.ndarray, end: np.ndarray, renewal: str) -> tuple[dict, np.ndarray]:
    """Walk each unit's events in order; return its segments and a status per event.

    Status: 0 kept, 1 dated after decommission, 2 second decommission, 3 on the
    install date, 4 on or before the previous event. Segments (dict of arrays):
    code, life, life_start, start, stop, failed, mode, open (the unit's last,
    still running segment).
    """
    codes = ev["code"].tolist()
    dates = ev["date"].view(np.int64).tolist()
    kinds = ev["kind"].tolist()
    modes = ev["mode"].tolist()
    inst = install.view(np.int64)
    ends = end.view(np.int64)
    replace = renewal == "replace"
    n = len(codes)
    status = np.zeros(n, dtype=np.int8)
    cols = {k: [] for k in ("code", "life", "life_start", "start", "stop", "failed", "mode", "open")}

    def add(u, life, life_start, start, stop, failed, mode, is_open):
        for k, v in zip(cols, (u, life, life_start, start, stop, failed, mode, is_open)):
            cols[k].append(v)

    i = 0
    while i < n:
        u = codes[i]
        j = i
        while j < n and codes[j] == u:
            j += 1
        first, stop = int(inst[u]), int(ends[u])
        life, life_start, row_start, prev = 1, first, first, first
        awaiting = seen_decommission = False
        for k in range(i, j):
            d, kind = dates[k], kinds[k]
            if d > stop:
                status[k] = 1
                continue
            if kind == "decommission":
                if seen_decommission:
                    status[k] = 2
                else:
                    seen_decommission = True
                continue
            repair_of_failure = kind == "replacement" and awaiting and d == prev
            if d <= prev and not repair_of_failure:
                status[k] = 3 if d == first and prev == first else 4
                continue
            if kind == "failure":
                add(u, life, life_start, row_start, d, True, str(modes[k]), False)
                if replace:
                    life, life_start = life + 1, d
                row_start, awaiting = d, True
            elif awaiting:  # replacement right after a failure: downtime is not at risk
                if not replace:
                    life += 1
                life_start, row_start, awaiting = d, d, False
            else:  # planned renewal: the life ends as a suspension
                add(u, life, life_start, row_start, d, False, "", False)
                life, life_start, row_start = life + 1, d, d
            prev = d
        if row_start < stop:
            add(u, life, life_start, row_start, stop, False, "", True)
        i = j
    seg = {
        "code": np.asarray(cols["code"], dtype=np.int64),
        "life": np.asarray(cols["life"], dtype=np.int64),
        "life_start": np.asarray(cols["life_start"], dtype=np.int64).view("datetime64[ns]"),
        "start": np.asarray(cols["start"], dtype=np.int64).view("datetime64[ns]"),
        "stop": np.asarray(cols["stop"], dtype=np.int64).view("datetime64[ns]"),
        "failed": np.asarray(cols["failed"], dtype=bool),
        "mode": np.asarray(cols["mode"], dtype=object),
        "open": np.asarray(cols["open"], dtype=bool),
    }
    return seg, status


def _pieces(seg: dict, r_code: np.ndarray, r_date: np.ndarray, r_values: np.ndarray, register: pd.DataFrame,
            unit_row: np.ndarray, ids: pd.Index, install: np.ndarray, decommissioned: np.ndarray,
            settings: BuildSettings) -> tuple[pd.DataFrame, bool]:
    """Cut segments at reading dates into life-table rows (one frame, unit order kept).

    Also returns whether the rows are already in (unit_id, life, entry_age) order.
    """
    code = seg["code"]
    obs_start = install[code]
    if settings.records_start is not None:
        obs_start = np.maximum(obs_start, np.datetime64(pd.Timestamp(settings.records_start).to_datetime64(), "ns"))
    a = np.maximum(seg["start"], obs_start)
    seen = seg["stop"] > a  # segments that ended before records began are not observed
    seg = {k: v[seen] for k, v in seg.items()}
    code, a, b = seg["code"], a[seen], seg["stop"]
    n_r = len(r_code)
    # One sortable key per (unit, date): unit code times the number of distinct dates plus the date's rank.
    distinct_dates, rank = np.unique(np.concatenate([r_date, a, b]), return_inverse=True)
    width = np.int64(len(distinct_dates) + 1)
    r_key = r_code.astype(np.int64) * width + rank[:n_r]
    a_key = code * width + rank[n_r:n_r + len(a)]
    b_key = code * width + rank[n_r + len(a):]
    lo = np.searchsorted(r_key, a_key, side="right")
    hi = np.searchsorted(r_key, b_key, side="left")
    first_reading = np.searchsorted(r_key, code * width, side="left")
    has_readings = np.searchsorted(r_key, (code + 1) * width, side="left") > first_reading
    cuts = hi - lo
    per = cuts + 1
    owner = np.repeat(np.arange(len(code)), per)
    j = np.arange(int(per.sum())) - np.repeat(np.cumsum(per) - per, per)
    lo_o, final = lo[owner], j == cuts[owner]
    if n_r:
        p = np.where(j == 0, a[owner], r_date[np.clip(lo_o + j - 1, 0, n_r - 1)])
        q = np.where(final, b[owner], r_date[np.clip(lo_o + j, 0, n_r - 1)])
    else:
        p, q = a[owner], b[owner]
    u = code[owner]
    life_start = seg["life_start"][owner]
    day = np.timedelta64(1, "D")
    data = {
        "unit_id": ids.to_numpy(dtype=object)[u],
        "life": seg["life"][owner],
        "entry_age": (p - life_start) / day,
        "exit_age": (q - life_start) / day,
        "failed": seg["failed"][owner] & final,
        "mode": np.where(final, seg["mode"][owner], ""),
        "in_service": seg["open"][owner] & final & ~decommissioned[u],
        "install_date": install[u],
        "entry_date": p,
        "exit_date": q,
    }
    rows = unit_row[u]
    for c in settings.register_columns:
        column = register[c]
        if isinstance(column.dtype, pd.CategoricalDtype) or column.dtype == object:
            data[c] = np.asarray(column, dtype=object)[rows]
        else:
            data[c] = column.to_numpy()[rows]
    if settings.reading_columns:
        at = np.maximum(lo_o + j - 1, first_reading[owner])
        got = has_readings[owner]
        for i, c in enumerate(settings.reading_columns):
            data[c] = np.where(got, r_values[np.clip(at, 0, max(n_r - 1, 0)), i] if n_r else np.nan, np.nan)
    columns = ["unit_id", "life", "entry_age", "exit_age", "failed", "mode", "in_service",
               "install_date", "entry_date", "exit_date", *settings.register_columns, *settings.reading_columns]
    frame = pd.DataFrame({c: data[c] for c in columns}, columns=columns, copy=False)
    if frame.empty:
        frame = frame.astype({c: object for c in columns})
        frame["failed"] = frame["failed"].astype(bool)
        frame["in_service"] = frame["in_service"].astype(bool)
        return frame, False
    life, age = data["life"], data["entry_age"]
    step = (u[1:] > u[:-1]) | ((u[1:] == u[:-1]) & ((life[1:] > life[:-1])
                                                    | ((life[1:] == life[:-1]) & (age[1:] >= age[:-1]))))
    return frame, bool(step.all())


def build_from_intervals(rows: pd.DataFrame, settings: BuildSettings, *, dated: bool) -> BuildOutcome:
    """Check typed life-table rows (shape ``life_table``) and mark in-service rows.

    ``rows``: unit_id, life, entry_age, exit_age (days), failed, mode, extra
    columns; when ``dated``, also install_date, entry_date, exit_date. Rejects
    negative entry ages, zero or negative durations and intervals that overlap
    an earlier interval of the same life. In a backtest (dated only) rows that
    start after ``as_of`` are set aside and rows spanning it end there as
    suspensions. A unit's last row, when not a failure, is in service (dated:
    only when it ends on ``as_of``), unless the unit is marked ``retired``
    (optional bool column: any row of the unit marked retires the unit).
    """
    out = BuildOutcome(frame=pd.DataFrame())
    frame = rows.copy()
    if dated and settings.backtest:
        later = (frame["entry_date"] >= settings.as_of).to_numpy()
        out.set_aside(_source(frame), frame.index.to_numpy()[later])
        frame = frame[~later].copy()
        cut = frame["exit_date"] > settings.as_of
        frame.loc[cut, "exit_date"] = settings.as_of
        frame.loc[cut, "exit_age"] = (settings.as_of - frame.loc[cut, "install_date"]) / DAY
        frame.loc[cut, "failed"] = False
        frame.loc[cut, "mode"] = ""
    src = _source(frame)
    negative = (frame["entry_age"] < 0).to_numpy()
    out.reject(src, frame.index.to_numpy()[negative], "entry", frame["entry_age"][negative].tolist(),
               "negative entry age")
    frame = frame[~negative]
    short = (frame["exit_age"] <= frame["entry_age"]).to_numpy()
    out.reject(src, frame.index.to_numpy()[short], "exit", frame["exit_age"][short].tolist(),
               "exit not after entry (zero or negative duration)")
    frame = frame[~short]
    order = frame.sort_values(["unit_id", "life", "entry_age", "exit_age", "failed", "mode", "_source", "_line"],
                              kind="mergesort")
    keep = np.ones(len(order), dtype=bool)
    last_key, last_exit = None, -np.inf
    # Sequential: an overlapping interval is dropped and does not move the life's last exit.
    for i, (uid, lf, entry, exit_) in enumerate(zip(order["unit_id"].tolist(), order["life"].tolist(),
                                                     order["entry_age"].tolist(), order["exit_age"].tolist())):
        if (uid, lf) != last_key:
            last_key, last_exit = (uid, lf), -np.inf
        if entry < last_exit:
            keep[i] = False
            continue
        last_exit = exit_
    out.reject(src, order.index.to_numpy()[~keep], "entry", order["entry_age"][~keep].tolist(),
               "interval overlaps another interval of the same life")
    frame = order[keep].copy()
    out.keep(src, frame.index.to_numpy())
    last = frame.groupby(["unit_id", "life"], sort=False)["exit_age"].transform("max") == frame["exit_age"]
    top_life = frame.groupby("unit_id", sort=False)["life"].transform("max") == frame["life"]
    in_service = last & top_life & ~frame["failed"].astype(bool)
    if dated:
        in_service &= frame["exit_date"] == settings.as_of
    if "retired" in frame:
        in_service &= ~frame.groupby("unit_id", sort=False)["retired"].transform("any").astype(bool)
    frame["in_service"] = in_service.to_numpy()
    out.frame = frame.drop(columns=[c for c in ("_source", "_line", "_raw", "_malformed") if c in frame])
    return out

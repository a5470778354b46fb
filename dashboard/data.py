"""What the board shows, read from a log: the only module of the board that does I/O.

:func:`load_snapshot` reads a recorder (SQLite) log read-only, so ``ebullio run`` can
keep writing it (WAL), and returns a JSON-ready snapshot that the views' callbacks
turn into figures without touching the file. A CSV log is replayed once through the
estimator instead. Long series are downsampled for display with a min/max envelope
(:func:`envelope`): each bucket keeps its lowest and highest point, so spikes and
switch-offs stay visible; every figure on the board is still computed from the full
data by the estimator.
"""

from __future__ import annotations

import json
import math
import sqlite3
from collections.abc import Sequence
from pathlib import Path

from monitor.recorder import is_recorder_log

#: Points per series sent to the browser at most (about two per horizontal pixel).
MAX_POINTS = 2400
#: Channels drawn on the readings chart.
CHANNELS = ("water", "element", "ambient", "power")


def envelope(
    t: Sequence[float], y: Sequence[float | None], max_points: int = MAX_POINTS
) -> tuple[list[float], list[float | None]]:
    """Return (t, y) reduced to at most ``max_points`` by a min/max envelope per bucket.

    Each bucket of consecutive points gives its minimum and its maximum, in time
    order, so peaks survive; series short enough are returned whole.
    """
    if len(t) <= max_points:
        return list(t), list(y)
    buckets = max_points // 2
    size = math.ceil(len(t) / buckets)
    out_t: list[float] = []
    out_y: list[float | None] = []
    for start in range(0, len(t), size):
        idx = [i for i in range(start, min(start + size, len(t))) if y[i] is not None]
        if not idx:
            continue
        lo = min(idx, key=lambda i: y[i])  # type: ignore[arg-type,return-value]
        hi = max(idx, key=lambda i: y[i])  # type: ignore[arg-type,return-value]
        for i in sorted({lo, hi}):
            out_t.append(t[i])
            out_y.append(y[i])
    return out_t, out_y


def _connect(path: str) -> sqlite3.Connection:
    uri = f"{Path(path).resolve().as_uri()}?mode=ro"
    return sqlite3.connect(uri, uri=True, timeout=5.0)


def _sqlite_snapshot(path: str, vessel: str | None, window_s: float) -> dict[str, object]:
    conn = _connect(path)
    try:
        names = [v for (v,) in conn.execute("SELECT DISTINCT vessel FROM samples ORDER BY vessel")]
        latest: dict[str, object] = {}
        for row in conn.execute(
            f"SELECT {', '.join(_EST_KEYS)}, detail, vessel FROM estimates WHERE id IN "
            "(SELECT max(id) FROM estimates GROUP BY vessel)"
        ):  # fmt: skip
            latest[row[-1]] = _estimates([row[:-1]])["latest"]
        chosen = vessel if vessel in names else (names[0] if names else None)
        (last_t,) = conn.execute("SELECT max(t) FROM samples").fetchone()
        detail: dict[str, object] = {}
        if chosen is not None:
            (vessel_last,) = conn.execute(
                "SELECT max(t) FROM samples WHERE vessel = ?", (chosen,)
            ).fetchone()
            since = (vessel_last or 0.0) - window_s
            series: dict[str, object] = {}
            for channel in CHANNELS:
                rows = conn.execute(
                    "SELECT t, value FROM samples WHERE vessel = ? AND channel = ? AND t >= ?"
                    " ORDER BY id", (chosen, channel, since),
                ).fetchall()  # fmt: skip
                t, y = envelope([r[0] for r in rows], [r[1] for r in rows])
                series[channel] = {"t": t, "y": y}
            est_rows = conn.execute(
                f"SELECT {', '.join(_EST_KEYS)}, detail FROM estimates WHERE vessel = ? AND t >= ?"
                " ORDER BY id", (chosen, since),
            ).fetchall()  # fmt: skip
            detail = {"series": series, **_estimates(est_rows)}
        return {"log": Path(path).name, "kind": "recorder", "last_t": last_t, "vessels": names,
                "latest": latest, "chosen": chosen, "detail": detail}  # fmt: skip
    finally:
        conn.close()


_EST_KEYS = ("t", "phase", "water_c", "water_mass_kg", "water_mass_std", "ua_w_per_k", "ua_std",
             "element_conductance_w_per_k", "element_conductance_std", "target_c",
             "time_to_target_s", "time_to_target_lo_s", "time_to_target_hi_s")  # fmt: skip


def _estimates(rows: list[tuple]) -> dict[str, object]:
    """Return the estimate series (downsampled by taking every n-th row) and the latest."""
    latest = None
    if rows:
        last = rows[-1]
        latest = dict(zip(_EST_KEYS, last[:-1], strict=True))
        detail = json.loads(last[-1]) if last[-1] else {}
        latest["flags"] = detail.get("flags", [])
        latest["power_w"] = detail.get("power_w")
        latest["target_reason"] = detail.get("target_reason", "")
    step = max(1, math.ceil(len(rows) / MAX_POINTS))
    picked = rows[::step]
    columns = {k: [r[i] for r in picked] for i, k in enumerate(_EST_KEYS) if k != "phase"}
    return {"estimates": columns, "latest": latest}


def load_snapshot(
    path: str, vessel: str | None = None, window_s: float = 3 * 3600.0
) -> dict[str, object]:
    """Return what the board shows of the log at ``path``.

    ``vessels`` (names), ``latest`` (each vessel's newest estimate, for the fleet) and,
    for the ``chosen`` vessel (``vessel``, or the first), ``detail``: its readings and
    estimates over the last ``window_s`` seconds. Raises LogFormatError (from the
    readers) when the file is not a log.
    """
    if is_recorder_log(path):
        return _sqlite_snapshot(path, vessel, window_s)
    return _csv_snapshot(path, vessel)


def _csv_snapshot(path: str, vessel: str | None) -> dict[str, object]:
    from monitor.interchange import read_csv
    from monitor.replay import replay_run, split_runs

    log = read_csv(path)
    runs, _ = split_runs([log])
    start = log.start_epoch_s or 0.0
    vessels: dict[str, dict[str, object]] = {}
    for run in runs:
        rows: list[tuple] = []

        def keep(_run, e, rows=rows) -> None:
            target = e.target
            m, g = e.water_mass_kg, e.element_conductance_w_per_k
            detail = {"flags": [f.as_dict() for f in e.flags], "power_w": e.power_w,
                      "target_reason": target.reason if target else ""}  # fmt: skip
            rows.append((start + e.t_s, str(e.phase), e.water_c, m.value if m else None,
                         m.std if m else None, e.ua_w_per_k.value, e.ua_w_per_k.std,
                         g.value if g else None, g.std if g else None,
                         target.target_c if target else None,
                         target.eta_s if target else None, target.lo_s if target else None,
                         target.hi_s if target else None, json.dumps(detail)))  # fmt: skip

        replay_run(run, on_estimate=keep)
        series = {}
        for channel in CHANNELS:
            pts = [(start + r.time_s, r.values.get(channel)) for r in run.rows]
            t, y = envelope([p[0] for p in pts], [p[1] for p in pts])
            series[channel] = {"t": t, "y": y}
        vessels[run.vessel] = {"series": series, **_estimates(rows)}
    names = sorted(vessels)
    chosen = vessel if vessel in vessels else (names[0] if names else None)
    return {"log": Path(path).name, "kind": "csv", "last_t": None, "vessels": names,
            "latest": {v: d["latest"] for v, d in vessels.items()}, "chosen": chosen,
            "detail": vessels.get(chosen, {}) if chosen else {}}  # fmt: skip


def run_history(path: str, vessel: str | None = None) -> dict[str, object]:
    """Return a vessel's run summaries with their drift flags, and each rule's baseline.

    Replays the whole log (the figures come from the full data), so the maintenance
    view calls it when asked, not on every poll.
    """
    from monitor.drift import RULES, baselines_of
    from monitor.replay import replay

    result = replay([path])
    runs = [r for r in result["runs"] if isinstance(r, dict)]
    names = sorted({str(r["vessel"]) for r in runs})
    chosen = vessel if vessel in names else (names[0] if names else None)
    mine = [r for r in runs if r["vessel"] == chosen]
    keep = ("run", "start_utc", "model", "drift", *(rule.key for rule in RULES))
    baselines = baselines_of(mine)
    return {"vessels": names, "chosen": chosen, "baselines": baselines,
            "runs": [{k: r.get(k) for k in keep} for r in mine]}  # fmt: skip

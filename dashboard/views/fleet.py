"""Fleet view: every vessel on one screen, the ones that need attention first."""

from __future__ import annotations

from dash import Dash, Input, Output, html

from dashboard import ids
from dashboard.theme import (
    LEVEL_MARK,
    LEVEL_RANK,
    duration_text,
    iso_minutes,
    verdict_mark,
    worst_level,
)


def fleet_rows(snapshot: dict | None) -> list[dict[str, object]]:
    """Return one row per vessel from a snapshot, worst status first (then by name)."""
    rows = []
    snapshot = snapshot or {}
    runs = snapshot.get("runs") or {}
    for vessel in snapshot.get("vessels") or sorted(snapshot.get("latest") or {}):
        latest = (snapshot.get("latest") or {}).get(vessel) or {}
        run = runs.get(vessel) or {}
        # the live flags and those the last ended run raised against the earlier runs
        flags = [*(latest.get("flags") or []), *(run.get("drift") or [])]
        status = worst_level(flags)
        eta = latest.get("time_to_target_s") if latest.get("phase") == "heating" else None
        start = run.get("start_t")
        rows.append({
            "vessel": vessel,
            "status": status,
            "flags": [f["message"] for f in flags if f.get("level") != "notice"],
            "phase": latest.get("phase") or "-",
            "water_c": latest.get("water_c"),
            "time_to_target": duration_text(eta) if eta is not None else "-",
            "scaling_index": run.get("scaling_index"),
            "last_run": f"{run['run']} ({iso_minutes(start)})" if run.get("run") else "-",
            "last_verdict": (run.get("verdict") or {}).get("status"),
            "last_verdict_mark": verdict_mark(run.get("verdict")) if run.get("run") else "-",
        })  # fmt: skip
    rows.sort(key=lambda r: (-LEVEL_RANK.get(str(r["status"]), 0), str(r["vessel"])))
    return rows


def render_fleet(snapshot: dict | None) -> html.Table:
    """Return the fleet table for a snapshot."""
    head = html.Tr([html.Th(h) for h in ("vessel", "status", "phase", "water (°C)",
                                         "time to target", "scaling index (1 − G/G₀)",
                                         "last run (UTC)", "last run's verdict",
                                         "what needs doing")])  # fmt: skip
    body = []
    for r in fleet_rows(snapshot):
        water = r["water_c"]
        body.append(html.Tr([
            html.Td(r["vessel"]),
            html.Td(LEVEL_MARK[str(r["status"])], className=f"level-{r['status']}"),
            html.Td(r["phase"]),
            html.Td(f"{water:.1f}" if isinstance(water, float) else "-"),
            html.Td(r["time_to_target"]),
            html.Td(f"{index:.0%}" if isinstance(index := r["scaling_index"], float) else "-"),
            html.Td(r["last_run"]),
            html.Td(r["last_verdict_mark"], className=f"verdict-{r['last_verdict']}",
                    style={"fontWeight": 700} if r["last_verdict"] == "doubtful" else {}),
            html.Td("; ".join(r["flags"]) or "-"),  # type: ignore[arg-type]
        ]))  # fmt: skip
    return html.Table([html.Thead(head), html.Tbody(body)], className="fleet")


def layout() -> html.Section:
    """Return the fleet view's layout."""
    return html.Section([html.H2("Fleet"), html.Div(id=ids.FLEET_TABLE)], className="view")


def register(app: Dash) -> None:
    """Attach the fleet view's callbacks to ``app``."""
    app.callback(Output(ids.FLEET_TABLE, "children"), Input(ids.STORE, "data"))(render_fleet)

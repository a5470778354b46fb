"""The board's wording helpers: levels as words and shapes, durations.

The colours are monitor.reports.plots's."""

from __future__ import annotations

from monitor.runs.drift import LEVEL_RANK, VERDICT_MARK, worst_level  # the one ranking of levels

__all__ = ["LEVEL_RANK", "VERDICT_MARK", "worst_level"]

#: The live charts' look (our own: white ground, light grid, plain axis lines).
CHART_GROUND = {
    "paper_bgcolor": "#FFFFFF",
    "plot_bgcolor": "#FFFFFF",
    "font": {"family": "system-ui, sans-serif", "size": 12, "color": "#222222"},
}


def chart_axis(**extra: object) -> dict[str, object]:
    """Return one axis of the board's charts in its look, with ``extra`` settings on top."""
    return {"gridcolor": "#E3E3E3", "zerolinecolor": "#C4C4C4", "linecolor": "#8A8A8A",
            "showline": True, "ticks": "outside", "automargin": True, **extra}  # fmt: skip


#: Level shown with a word and a shape, never by colour alone.
LEVEL_MARK = {"alarm": "▲ alarm", "warning": "● warning", "notice": "○ notice", "ok": "ok"}


def verdict_mark(verdict: dict | None) -> str:
    """Return a run verdict as its mark ('✕ doubtful: not judged'), or '-' for none.

    The marks are monitor.runs.drift.VERDICT_MARK, the report's own.
    """
    status = str((verdict or {}).get("status"))
    return VERDICT_MARK.get(status, "-")


def duration_text(seconds: float | None) -> str:
    """Return a duration as '12 min 05 s' (or '-' for none)."""
    if seconds is None:
        return "-"
    seconds = max(0.0, float(seconds))
    minutes, secs = divmod(round(seconds), 60)
    hours, minutes = divmod(minutes, 60)
    if hours:
        return f"{hours} h {minutes:02d} min"
    return f"{minutes} min {secs:02d} s" if minutes else f"{secs} s"


def iso_minutes(epoch_s: float | None) -> str:
    """Return a Unix time as ISO 8601 UTC to the minute ('2026-12-02 09:15'), or '-'."""
    if not isinstance(epoch_s, int | float):
        return "-"
    from datetime import UTC, datetime

    return datetime.fromtimestamp(epoch_s, UTC).strftime("%Y-%m-%d %H:%M")

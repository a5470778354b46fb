"""Read any log ebullio writes, CSV interchange or the recorder's SQLite, as a whole or a stream.

A recorder log holds samples in arrival order; :func:`read_log` turns them into
one :class:`~monitor.records.interchange.InterchangeLog` per vessel and session (a process of
the live service) with the very steps the live service took (:mod:`monitor.runs.live`), the
vessel's recorded metadata, and every quarantined input as a rejected line (``line``
0: the SQLite row id is in the reason). So a replay starts a new run where the live
service started one at a restart, and numbers the runs as it did.
"""

from __future__ import annotations

import math
import time
from collections.abc import Iterable, Iterator, Mapping
from itertools import groupby
from pathlib import Path

from drivers.channels import Quarantined
from drivers.errors import LogFormatError
from monitor.records.interchange import (
    InterchangeLog,
    LogRow,
    stream_csv,
)
from monitor.records.recorder import (
    is_recorder_log,
    read_quarantine,
    read_samples_by_session,
    read_vessels,
)
from monitor.runs.live import rows_of_steps, settle_channels, steps_from_samples


def _rejected(path: str) -> list[Quarantined]:
    """Return a recorder log's quarantine as set-aside records of the log file (the
    instrument and position it came from in ``where``)."""
    out = []
    for q in read_quarantine(path):
        raw = q["raw"]
        data = raw if isinstance(raw, bytes) else str(raw).encode("utf-8", "surrogateescape")
        where = f"quarantine id {q['id']}, {q['source']} {q['location']}"
        out.append(Quarantined(float(q["t"]), path, where, str(q["reason"]), data))  # type: ignore[arg-type]
    return out


def log_integrity(
    path: str | Path, verified: Mapping[str, object] | None = None
) -> dict[str, object]:
    """Return what can be said of a log's integrity: ``file``, ``state``, ``reason``.

    A recorder log is checked as ``ebullio verify`` does (:func:`monitor.records.recorder.verify`:
    ``intact``, ``tampered`` or ``damaged``); a CSV log carries no hash chain, so its
    state is ``unchecked``. ``replay``, ``fleet``, ``report``, ``export`` and the board
    say so when a recorder log is not intact. ``verified`` is a :func:`verify` result of
    ``path`` already at hand (the report makes one), so the chain is not read twice.
    """
    from monitor.records.recorder import verify

    if not is_recorder_log(path):
        return {"file": str(path), "state": "unchecked",
                "reason": "a CSV log carries no hash chain"}  # fmt: skip
    result = verify(path) if verified is None else verified
    return {"file": str(path), "state": result["state"], "reason": result["reason"]}


def integrity_warnings(checks: list[dict[str, object]]) -> list[str]:
    """Return one sentence per recorder log that is not intact (for terminals and pages)."""
    return [
        f"WARNING: {c['file']} failed its integrity check ({c['state']}): {c['reason']} "
        "The figures from it come from a log that was altered or damaged."
        for c in checks
        if c["state"] not in ("intact", "unchecked")
    ]


def read_log(path: str | Path, vessel: str | None = None) -> list[InterchangeLog]:
    """Return the log at ``path`` as interchange logs, rows and all: one per vessel and
    session for SQLite (the log's quarantine with the first), one for CSV.

    ``vessel``: of a recorder log, read only that vessel's samples (its runs split
    the same, since each vessel's instants are assembled apart); a CSV log is read
    whole. Raises LogFormatError when the file is neither. :func:`stream_log` reads
    the same in memory that does not grow with the log.
    """
    seen, items = stream_log(path, vessel)
    for log, row in items:
        log.rows.append(row)
    if not is_recorder_log(path):
        return seen
    holder, logs = seen[0], seen[1:]
    for log in logs:
        settle_channels(log)
    if logs:
        logs[0].rejected.extend(holder.rejected)
    elif holder.rejected:
        holder.channels = ["water", "power"]
        logs = [holder]
    return logs


def stream_log(
    path: str | Path, vessel: str | None = None
) -> tuple[list[InterchangeLog], Iterator[tuple[InterchangeLog, LogRow]]]:
    """Return the log at ``path`` as a stream: the header logs seen so far (a list that
    grows as the stream is read) and an iterator of (header log, row), in the order
    :func:`read_log` gives them, in memory that does not grow with the log.

    A CSV log is one header log (:func:`monitor.records.interchange.stream_csv`); a
    recorder log has one per vessel and session, made at its first step, with channels
    added as they are seen, and one more header log holding the log's quarantine. Errors
    as :func:`read_log`.
    """
    path = str(path)
    if not Path(path).exists():
        raise LogFormatError(f"{path}: no such file")
    if not is_recorder_log(path):
        with open(path, "rb") as handle:
            if handle.read(16).startswith(b"SQLite format 3"):
                raise LogFormatError(f"{path}: an SQLite file, but not an ebullio recorder log")
        log, rows = stream_csv(path)
        return [log], ((log, row) for row in rows)
    seen = [InterchangeLog(path, {}, [], [], _rejected(path))]
    metadata = read_vessels(path)

    known: set[int] = set()

    def items() -> Iterator[tuple[InterchangeLog, LogRow]]:
        numbered = enumerate(read_samples_by_session(path, vessel))
        for _, group in groupby(numbered, key=lambda item: item[1][0]):
            steps = steps_from_samples((position, sample) for position, (_, sample) in group)
            for log, row in rows_of_steps(steps, metadata, path):  # this session's
                if id(log) not in known:
                    known.add(id(log))
                    seen.append(log)
                yield log, row

    return seen, items()


def nan_as_blank(rows: Iterable[LogRow]) -> Iterator[LogRow]:
    """Yield rows with NaN (a known fault) written as a blank cell, as the format wants."""
    for r in rows:
        if any(math.isnan(v) for v in r.values.values()):
            values = {k: v for k, v in r.values.items() if not math.isnan(v)}
            r = LogRow(r.line, r.time_s, values, r.vessel, r.run)
        yield r


def record_summaries(paths: list[str], result: dict[str, object]) -> int:
    """Append a replay's run summaries to the recorder log they came from; return how many.

    The summaries go in the ``runs`` table as a new session of their own (new blocks
    of the hash chain; nothing already recorded changes). Raises LogFormatError unless
    there is exactly one log and it is a recorder log.
    """
    from monitor import __version__
    from monitor.records.recorder import Recorder
    from monitor.records.schema import run_record

    if len(paths) != 1 or not is_recorder_log(paths[0]):
        raise LogFormatError("--record needs exactly one recorder (SQLite) log")
    runs = result["runs"]
    assert isinstance(runs, list)
    with Recorder(paths[0], version=__version__, config_text=None) as rec:
        for run in runs:
            rec.add_run(**run_record({"source": "replay", **run}))
        rec.add_event(time.time(), "summaries", "replay", f"{len(runs)} run summaries")
    return len(runs)

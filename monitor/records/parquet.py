"""A recorder log's readings and estimates as Parquet files, for analysis in other tools.

Read through the recorder's own readers (:func:`monitor.records.recorder.read_samples_by_session`
and :func:`~monitor.records.recorder.read_estimates`), so whatever the log's schema
version the files are the same. Rows are gathered as Python values :data:`BATCH` at a
time (an estimate has 33 columns: 262,144 rows of them as Python objects took 480 MiB)
and written in row groups of :data:`ROW_GROUP` rows, in memory that does not grow with
the log. docs/parquet.md lists the columns.
"""

from __future__ import annotations

import json
import math
import os
from collections.abc import Iterable, Iterator, Sequence
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq

from drivers.errors import LogFormatError
from drivers.sample import channel_unit
from monitor.records.recorder import is_recorder_log, read_estimates, read_samples_by_session
from monitor.records.schema import ESTIMATE_FIELDS

__all__ = ["BATCH", "ESTIMATE_SCHEMA", "ROW_GROUP", "SAMPLE_SCHEMA", "export_parquet"]

#: Rows per row group of the files.
ROW_GROUP = 131_072
#: Rows gathered as Python values before they become one Arrow record batch.
BATCH = 16_384

_TIME = pa.timestamp("us", tz="UTC")
_TEXT = pa.dictionary(pa.int32(), pa.string())
#: One row per reading, in recorded order.
SAMPLE_SCHEMA = pa.schema(
    [
        pa.field("time", _TIME, nullable=False),
        pa.field("t", pa.float64(), nullable=False),
        pa.field("session", pa.int32(), nullable=False),
        pa.field("vessel", _TEXT, nullable=False),
        pa.field("channel", _TEXT, nullable=False),
        pa.field("unit", _TEXT),
        pa.field("value", pa.float64()),
        pa.field("quality", _TEXT, nullable=False),
        pa.field("source", _TEXT, nullable=False),
    ]
)
#: One row per recorded estimate, in recorded order: the flat form's keys.
ESTIMATE_SCHEMA = pa.schema(
    [
        pa.field("time", _TIME, nullable=False),
        pa.field("t", pa.float64(), nullable=False),
        pa.field("vessel", _TEXT, nullable=False),
        pa.field("run", _TEXT),
        pa.field("phase", _TEXT, nullable=False),
        *(
            pa.field(f.name, pa.string() if f.unit == "text" else pa.float64())
            for f in ESTIMATE_FIELDS
        ),
        pa.field("flags", pa.string()),
    ]
)


def _micros(t: float) -> int:
    """Return Unix seconds as whole microseconds (the ``time`` column's unit)."""
    return round(t * 1e6)


def _unit(channel: str, known: dict[str, str | None]) -> str | None:
    unit = known.get(channel, "")
    if unit == "":
        try:
            unit = channel_unit(channel)
        except KeyError:
            unit = None
        known[channel] = unit
    return unit


def _batches(schema: pa.Schema, rows: Iterable[Sequence[object]]) -> Iterator[pa.RecordBatch]:
    """Return ``rows`` (one item per column of ``schema``) as record batches of
    :data:`BATCH` rows at most."""
    columns: list[list] = [[] for _ in schema]
    for row in rows:
        for column, item in zip(columns, row, strict=True):
            column.append(item)
        if len(columns[0]) >= BATCH:
            yield pa.record_batch(columns, schema=schema)
            columns = [[] for _ in schema]
    if columns[0]:
        yield pa.record_batch(columns, schema=schema)


def _sample_rows(path: str, vessel: str | None) -> Iterator[tuple[object, ...]]:
    units: dict[str, str | None] = {}
    for session, s in read_samples_by_session(path, vessel):
        value = s.value
        yield (_micros(s.t), s.t, session, s.vessel, s.channel, _unit(s.channel, units),
               None if math.isnan(value) else value, str(s.quality), s.source)  # fmt: skip


def _estimate_rows(path: str, vessel: str | None) -> Iterator[list[object]]:
    names = [f.name for f in ESTIMATE_FIELDS]
    for e in read_estimates(path, vessel):
        t = float(e["t"])  # type: ignore[arg-type]
        run = e.get("run")
        yield [_micros(t), t, e["vessel"], None if run is None else str(run), e["phase"],
               *(e.get(name) for name in names),
               json.dumps(e.get("flags") or [], sort_keys=True, allow_nan=False)]  # fmt: skip


def _write(out: Path, schema: pa.Schema, batches: Iterable[pa.RecordBatch]) -> int:
    """Write ``batches`` to ``out`` through a temporary file (replaced at the end, so a
    failed export leaves no half file); return the rows written."""
    out.parent.mkdir(parents=True, exist_ok=True)
    partial = out.with_name(out.name + ".partial")
    rows = 0
    try:
        with pq.ParquetWriter(partial, schema, compression="zstd") as writer:
            group: list[pa.RecordBatch] = []
            for batch in batches:
                group.append(batch)
                rows += batch.num_rows
                if sum(b.num_rows for b in group) >= ROW_GROUP:
                    writer.write_table(pa.Table.from_batches(group), row_group_size=ROW_GROUP)
                    group = []
            if group:
                writer.write_table(pa.Table.from_batches(group), row_group_size=ROW_GROUP)
        os.replace(partial, out)
    finally:
        partial.unlink(missing_ok=True)
    return rows


def export_parquet(
    log_path: str | os.PathLike[str],
    samples_out: str | os.PathLike[str] | None = None,
    estimates_out: str | os.PathLike[str] | None = None,
    vessel: str | None = None,
) -> dict[str, int]:
    """Write a recorder log's samples and/or estimates as Parquet; return rows written
    by kind (``samples``, ``estimates``).

    ``vessel`` keeps one vessel's rows (all by default). Raises LogFormatError when the
    log is not a recorder log (a CSV log is already a table), and from the readers.
    """
    path = str(log_path)
    if not is_recorder_log(path):
        raise LogFormatError(f"{path}: a Parquet export reads a recorder (SQLite) log")
    written: dict[str, int] = {}
    if samples_out is not None:
        rows = _sample_rows(path, vessel)
        written["samples"] = _write(Path(samples_out), SAMPLE_SCHEMA, _batches(SAMPLE_SCHEMA, rows))
    if estimates_out is not None:
        rows = _estimate_rows(path, vessel)
        written["estimates"] = _write(
            Path(estimates_out), ESTIMATE_SCHEMA, _batches(ESTIMATE_SCHEMA, rows)
        )
    return written

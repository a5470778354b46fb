"""The CSV interchange format: read and write logs that people and other tools can open.

Layout (docs/csv-format.md describes it for users):

* optional metadata lines before the header, ``# key: value``;
* one header row: ``time_s`` (seconds from the start) or ``time`` (ISO 8601 with
  a UTC offset) first, then any of the channel columns below, and optionally
  ``vessel`` and ``run``;
* one row per instant; a blank cell is a missing reading.

Reading never drops input: a row that cannot be used (a bad cell, the wrong
number of cells, a time that does not move forward for its vessel) is kept, with
its line number and the reason, in :attr:`InterchangeLog.rejected` for quarantine, and
the rest of the file is read on. A file whose header cannot be understood is
refused as a whole with :class:`LogFormatError`.
"""

from __future__ import annotations

import csv
import io
import math
from collections.abc import Iterable, Iterator
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import TextIO

from drivers.channels import Quarantined
from drivers.errors import LogFormatError
from drivers.payloads import CHANNEL_COLUMNS as ROLE_COLUMNS
from drivers.sample import PLAIN_NUMBER, Sample

#: Channel roles the CSV interchange format carries (docs/csv-format.md), in column order.
INTERCHANGE_ROLES = ("water", "water_top", "element", "ambient", "power", "energy", "voltage",
                     "current", "pressure")  # fmt: skip
#: CSV column for each channel role, with the unit in its name (the MQTT keys' naming).
CHANNEL_COLUMNS: dict[str, str] = {role: ROLE_COLUMNS[role] for role in INTERCHANGE_ROLES}
COLUMN_CHANNELS = {column: channel for channel, column in CHANNEL_COLUMNS.items()}
TIME_COLUMNS = ("time_s", "time")
LABEL_COLUMNS = ("vessel", "run")


@dataclass(frozen=True, slots=True)
class LogRow:
    """One instant: time in s from the start of the log, and the readings present."""

    line: int
    time_s: float
    values: dict[str, float]
    vessel: str | None = None
    run: str | None = None


def _aside(name: str, number: int, raw: str, reason: str) -> Quarantined:
    """Return a line of ``name`` set aside (its text as read; undecodable bytes escaped)."""
    return Quarantined(None, name, f"line {number}", reason,
                       raw.encode("utf-8", "surrogateescape"), line=number)  # fmt: skip


@dataclass
class InterchangeLog:
    """A read log: metadata, the channel columns present, usable rows and rejected lines."""

    path: str
    metadata: dict[str, str | float]
    channels: list[str]
    rows: list[LogRow] = field(default_factory=list)
    rejected: list[Quarantined] = field(default_factory=list)
    start_epoch_s: float | None = None


def _parse_meta_value(text: str) -> str | float:
    try:
        return float(text)
    except ValueError:
        return text


def _format_number(value: float) -> str:
    if value == int(value) and abs(value) < 1e15:
        return str(int(value))
    return format(value, ".10g")


def _parse_iso(text: str) -> float:
    stamp = datetime.fromisoformat(text)
    if stamp.tzinfo is None:
        raise ValueError(f"time {text!r} has no UTC offset")
    return stamp.timestamp()


def read_csv(path: str | Path) -> InterchangeLog:
    """Return the log in a CSV interchange file; unusable rows go to ``rejected``.

    Any bytes are taken: a UTF-8 byte-order mark at the start is skipped, and a line
    that is not UTF-8, or whose cells CSV cannot split (a field over the csv module's
    limit, a stray quote), is set aside with its line number and reason like any
    other bad row (its bytes kept, undecodable ones as ``\\xNN``). Raises
    :class:`LogFormatError` (with file and line) when there is no header, the first
    column is not a time column, or a column is unknown or repeated.
    """
    path = str(path)
    with open(path, "rb") as handle:
        return read_csv_text(_decoded_lines(handle), path)


class _Undecodable(str):
    """A line that is not UTF-8, kept with its bytes escaped (``\\xNN``)."""

    reason = "not UTF-8 text"


def _decoded_lines(handle: Iterable[bytes]) -> Iterator[str]:
    """Yield a binary file's lines as text; a line that is not UTF-8 as :class:`_Undecodable`."""
    for raw in handle:  # a byte-order mark decodes to U+FEFF: read_csv_text drops it
        try:
            yield raw.decode("utf-8")
        except UnicodeDecodeError as exc:
            line = _Undecodable(raw.decode("utf-8", "backslashreplace"))
            line.reason = f"not UTF-8 text (byte 0x{raw[exc.start]:02x} at byte {exc.start + 1})"
            yield line


def _split(raw: str) -> list[str]:
    """Return the CSV cells of one line; raise ValueError saying why it cannot be split."""
    if isinstance(raw, _Undecodable):
        raise ValueError(raw.reason)
    try:
        return next(csv.reader([raw]))
    except csv.Error as exc:
        raise ValueError(f"not a CSV row ({exc})") from None


def read_csv_text(handle: Iterable[str], name: str = "<text>") -> InterchangeLog:
    """Return the log read from text lines (an open text stream); see :func:`read_csv`."""
    log, rows = stream_csv_text(handle, name)
    log.rows.extend(rows)
    return log


def stream_csv(path: str | Path) -> tuple[InterchangeLog, Iterator[LogRow]]:
    """Return a CSV log's header (``rows`` empty) and an iterator of its rows, read as
    they are asked for, so a log of any length is read in constant memory.

    While the iterator runs it adds each line it sets aside to the header's
    ``rejected`` (before the next row is given) and, for a ``time`` column, the first
    row's time to ``start_epoch_s`` (before the first row is given). Errors as
    :func:`read_csv`, the header's at once.
    """
    handle = open(path, "rb")  # noqa: SIM115 (closed when the rows are read or dropped)
    try:
        log, rows = stream_csv_text(_decoded_lines(handle), str(path))
    except BaseException:
        handle.close()
        raise

    def closing() -> Iterator[LogRow]:
        with handle:
            yield from rows

    return log, closing()


def stream_csv_text(
    handle: Iterable[str], name: str = "<text>"
) -> tuple[InterchangeLog, Iterator[LogRow]]:
    """Return the header and a row iterator of a CSV log read from text lines (see
    :func:`stream_csv`)."""
    metadata: dict[str, str | float] = {}
    lines = iter(enumerate(handle, start=1))
    header: list[str] | None = None
    header_line = 0
    rejected: list[Quarantined] = []
    for number, raw in lines:
        if number == 1 and raw.startswith("\ufeff"):
            raw = raw[1:]  # the byte-order mark some editors write
        text = raw.strip()
        if not text:
            continue
        if isinstance(raw, _Undecodable) and text.startswith("#"):
            rejected.append(_aside(name, number, raw.rstrip("\r\n"), raw.reason))
            continue
        if text.startswith("#"):
            body = text[1:].strip()
            key, sep, value = body.partition(":")
            if sep and key.strip():
                metadata[key.strip()] = _parse_meta_value(value.strip())
            elif body:
                rejected.append(
                    _aside(name, number, raw.rstrip("\r\n"), "metadata line without 'key: value'")
                )
            continue
        try:
            header = [h.strip() for h in _split(raw)]
        except ValueError as exc:
            raise LogFormatError(f"{name}, line {number}: the header row is {exc}") from None
        header_line = number
        break
    if header is None:
        raise LogFormatError(f"{name}: no header row found")
    where = f"{name}, line {header_line}"
    if not header or header[0] not in TIME_COLUMNS:
        raise LogFormatError(
            f"{where}: the first column must be 'time_s' or 'time', "
            f"got {header[0] if header else ''!r}"
        )
    known = set(COLUMN_CHANNELS) | set(LABEL_COLUMNS)
    for column in header[1:]:
        if column not in known:
            listing = ", ".join([*TIME_COLUMNS, *CHANNEL_COLUMNS.values(), *LABEL_COLUMNS])
            raise LogFormatError(f"{where}: unknown column {column!r}; known columns: {listing}")
    if len(set(header)) != len(header):
        raise LogFormatError(f"{where}: a column is repeated in {header}")
    log = InterchangeLog(
        path=name,
        metadata=metadata,
        channels=[COLUMN_CHANNELS[c] for c in header[1:] if c in COLUMN_CHANNELS],
        rejected=rejected,
    )
    if not iso_header(header) and isinstance(metadata.get("start_time"), str):
        try:
            log.start_epoch_s = _parse_iso(str(metadata["start_time"]))
        except ValueError:
            log.rejected.append(
                _aside(
                    name,
                    0,
                    f"# start_time: {metadata['start_time']}",
                    "start_time is not ISO 8601 with a UTC offset",
                )
            )
    return log, _rows(lines, log, header, name)


def iso_header(header: list[str]) -> bool:
    """Return whether a header's time column is ISO 8601 (``time``) rather than seconds."""
    return header[0] == "time"


def _rows(
    lines: Iterator[tuple[int, str]], log: InterchangeLog, header: list[str], name: str
) -> Iterator[LogRow]:
    """Yield a CSV log's rows after its header (see :func:`stream_csv`)."""
    iso = iso_header(header)
    plan = _column_plan(header)
    first_epoch: float | None = None
    last_time: dict[str | None, float] = {}
    for number, raw in lines:
        if not raw.strip() or raw.lstrip().startswith("#"):
            if raw.strip():
                log.rejected.append(
                    _aside(name, number, raw.rstrip("\r\n"), "metadata line after the header")
                )
            continue
        row, reason = _parse_row(number, raw, header, iso, plan)
        if row is None:
            log.rejected.append(_aside(name, number, raw.rstrip("\r\n"), reason))
            continue
        previous = last_time.get(row.vessel)
        if previous is not None and row.time_s <= previous:
            log.rejected.append(
                _aside(
                    name,
                    number,
                    raw.rstrip("\r\n"),
                    f"line {number}: time does not move forward "
                    f"({cells_time(raw)} after an earlier row)",
                )
            )
            continue
        last_time[row.vessel] = row.time_s
        if iso:
            if first_epoch is None:
                first_epoch = log.start_epoch_s = row.time_s
            row = LogRow(row.line, row.time_s - first_epoch, row.values, row.vessel, row.run)
        yield row


def cells_time(raw: str) -> str:
    """Return the first cell of a raw CSV line (its time), for messages."""
    return raw.split(",", 1)[0].strip()


#: A line shorter than this without a quote is split on its commas directly, which is
#: what the csv module would do with it, at a fraction of the cost (a 7-day, 1 Hz log
#: has 604,801 of them); any other line goes through the csv module.
_PLAIN_LINE_CHARS = 4096


def _column_plan(header: list[str]) -> tuple[tuple[int, str, bool], ...]:
    """Return, for each column after the time, (position, channel or label name, whether
    it is a label column): worked out once per file, not once per row."""
    return tuple(
        (i, column if column in LABEL_COLUMNS else COLUMN_CHANNELS[column],
         column in LABEL_COLUMNS)
        for i, column in enumerate(header) if i
    )  # fmt: skip


def _parse_row(
    number: int, raw: str, header: list[str], iso: bool,
    plan: tuple[tuple[int, str, bool], ...] | None = None,
) -> tuple[LogRow | None, str]:  # fmt: skip
    if len(raw) < _PLAIN_LINE_CHARS and '"' not in raw and not isinstance(raw, _Undecodable):
        cells = raw.rstrip("\r\n").split(",")
    else:
        try:
            cells = _split(raw)
        except ValueError as exc:
            return None, f"line {number}: {exc}"
    if len(cells) != len(header):
        return None, f"line {number}: {len(cells)} cells where the header has {len(header)}"
    time_text = cells[0].strip()
    try:
        time_s = _parse_iso(time_text) if iso else float(time_text)
    except ValueError as exc:
        return None, f"line {number}: bad time {time_text!r} ({exc})"
    if not math.isfinite(time_s):
        return None, f"line {number}: time is not finite"
    values: dict[str, float] = {}
    vessel: str | None = None
    run: str | None = None
    plain = PLAIN_NUMBER.fullmatch
    for i, key, label in plan or _column_plan(header):
        text = cells[i].strip()
        if label:
            if key == "vessel":
                vessel = text or None
            else:
                run = text or None
            continue
        if not text:
            continue
        try:
            value = float(text)
        except ValueError:
            value = math.nan
        # float() takes all that PLAIN_NUMBER does and more: for a finite value, only
        # underscores and non-ASCII digits; anything else gets the checks with their words
        if value - value != 0.0 or "_" in text or not text.isascii():
            if plain(text) is None:
                shown = text if len(text) <= 40 else text[:40] + "..."
                return None, f"line {number}: column {header[i]!r} holds {shown!r}, not a number"
            return None, f"line {number}: column {header[i]!r} is not finite"
        values[key] = value
    return LogRow(number, time_s, values, vessel, run), ""


def rows_from_samples(batches: Iterable[list[Sample]], start_epoch_s: float) -> Iterator[LogRow]:
    """Yield one row per instant from batches of samples that share a time stamp.

    Channels with no CSV column (raw ``*_emf`` readings, the wall) are left out.
    """
    for batch in batches:
        if not batch:
            continue
        values = {s.channel: s.value for s in batch if s.channel in CHANNEL_COLUMNS}
        yield LogRow(0, batch[0].t - start_epoch_s, values, batch[0].vessel)


def write_csv(
    out: TextIO,
    rows: Iterable[LogRow],
    metadata: dict[str, str | float],
    channels: list[str],
    with_vessel: bool = False,
) -> int:
    """Write a CSV interchange log to ``out``; return the number of data rows written.

    ``channels`` fixes the column order (channel roles, see ``CHANNEL_COLUMNS``).
    """
    for key, value in metadata.items():
        if "\n" in str(key) or "\n" in str(value) or ":" in str(key):
            raise LogFormatError(f"metadata {key!r} cannot be written on one '# key: value' line")
        text = _format_number(value) if isinstance(value, float) else str(value)
        out.write(f"# {key}: {text}\n")
    writer = csv.writer(out, lineterminator="\n")
    columns = ["time_s", *(CHANNEL_COLUMNS[c] for c in channels)]
    if with_vessel:
        columns += ["vessel", "run"]
    writer.writerow(columns)
    count = 0
    for row in rows:
        cells = [_format_number(round(row.time_s, 3))]
        for channel in channels:
            value = row.values.get(channel)
            cells.append("" if value is None else _format_number(value))
        if with_vessel:
            cells += [row.vessel or "", row.run or ""]
        writer.writerow(cells)
        count += 1
    return count


def iso_utc(epoch_s: float) -> str:
    """Return an ISO 8601 UTC time stamp (with +00:00) for seconds since the epoch."""
    return datetime.fromtimestamp(epoch_s, tz=UTC).isoformat()


def to_text(rows: Iterable[LogRow], metadata: dict[str, str | float], channels: list[str]) -> str:
    """Return a CSV interchange log as a string (for tests and small logs)."""
    buffer = io.StringIO()
    write_csv(buffer, rows, metadata, channels)
    return buffer.getvalue()

"""The recorder: an SQLite log whose committed blocks are chained by SHA-256, and reading it back.

One file per deployment holds everything a replay or an audit needs: the readings
(``sample_packs``, or ``samples`` in a log of schema version 1), raw input that could
not be used (``quarantine``), the estimator's output (``estimates``, ``flags``), what
happened to the links (``events``: gaps, reconnects, back-pressure counts), each
vessel's ``key: value`` metadata (``vessels``), run summaries (``runs``) and one
``sessions`` row per process that opened the log (start time, ebullio version,
configuration text). Several sessions may append to one log, one after another.

Writing
    :class:`Recorder` keeps added rows in memory until :meth:`Recorder.commit`, which
    writes all of them and one ``blocks`` row in a single transaction. Nothing is
    written before that, so a crash loses at most the rows added since the last
    commit. Choosing that window is the service's job: it commits about once a
    second, so a crash costs at most about a second of readings.

    The file is in WAL mode with ``synchronous=FULL``: every commit syncs the
    write-ahead log to the disk before it returns, so a committed block survives a
    power cut or an operating-system crash as well as a killed process.
    ``synchronous=NORMAL`` would survive only the killed process (the last commits
    may still sit in the OS cache at a power cut). One sync a second costs nothing
    at the service's pace, and ``benchmarks/bench_recorder.py`` shows throughput
    stays far above the target with it.

    Each commit takes the write lock first (``BEGIN IMMEDIATE``) and reads the last
    block and the last row ids inside the transaction, so even two processes
    appending to one file at once produce a valid chain. The class itself is not
    thread-safe: calls must not overlap, but they may come from different threads
    one after another (``asyncio.to_thread`` uses a pool).

The layouts (:data:`LAYOUTS`; docs/recorder.md)
    Schema version 2, the one new logs get (:data:`LAYOUT`), keeps a commit's readings
    as one pack per vessel (:mod:`monitor.records.packs`: columns of fixed-width
    numbers, decimal readings as small integers), naming the vessel and each reading's
    (channel, source) series by ids of two small tables, ``sample_vessels`` and
    ``sample_series``, written in the block that first needs them. That is about a
    fifth of version 1's bytes on disk, where each reading was a ``samples`` row with
    an index entry (``benchmarks/bench_storage.py``). A log keeps the version it was
    made with: one of version 1 is read, verified and appended to as before.
    :class:`Recorder` turns the pending readings into packs inside the commit's
    transaction (:meth:`Recorder._packed`), after reading the names other writers
    committed, so ids stay unique with two writers on one file. Every reader of
    readings goes through :func:`_samples_by_block` or :class:`LogReader`, the one
    place that knows both layouts.

The hash chain
    Block ``k``'s ``hash`` is SHA-256 over, in order: the layout's label
    (:data:`HASH_LABEL` in a new log); ``k``, its commit time and its row count (the
    stored rows: a pack is one); the previous block's hash (32 zero bytes before block
    1); then for each table in the layout's :attr:`Layout.hashed_tables` order
    (:data:`HASHED_TABLES`) its name, its number of rows in the block, and those rows
    in id order, every column (``id`` and ``block`` included) in the layout's order
    (:data:`TABLE_COLUMNS`). A pack's bytes are hashed as stored, so a change to any
    reading inside it changes the hash. Each value is
    encoded by :func:`encode_value`: a type letter, then 8 bytes big-endian for an
    integer (signed) or a float (IEEE 754, so exactly), or a 4-byte length and the
    bytes for a text (UTF-8) or a blob. The length prefix already makes the encoding
    unambiguous, so blobs are hashed as their bytes, not as hex (half the bytes to
    hash). The block header is in the hash too, so a changed commit time or row
    count is caught. The last blocks can be cut, or the last one rewritten together
    with its hash, without breaking the chain: the chain head kept beside the log
    (``LOG.head``, signed with a key when one is configured) and published on MQTT
    guards against that (:func:`verify`; docs/recorder.md).

What SQLite stores, and so what reads back
    SQLite cannot store NaN: a NaN value is stored as NULL and reads back as NaN
    (fault samples carry NaN; a pack keeps the NaN itself). It stores ``-0.0`` as
    ``0.0``, so the recorder writes ``0.0`` for it in either layout (the sign of a
    zero reading carries no information). Infinities are kept. JSON columns
    (``detail``, ``evidence``, ``metadata``, ``summary``) are standard JSON with sorted
    keys; a non-finite number in them is written as ``null``, because standard JSON
    has no NaN.

Tables are ``STRICT`` (a value of the wrong type is refused, never converted). Besides
the ids there are two indices (:attr:`Layout.indices`), for the board's window
questions: packs by vessel and newest time (schema 1: samples by vessel, channel and
time), estimates by vessel and time. Replay reads whole tables in id order, and every
further index would slow the writer and grow the file.

What an estimate row holds
    The recorder owns the mapping of an estimate to its row, through
    :mod:`monitor.records.schema`: :meth:`Recorder.add_estimates` takes the flat form the
    service also publishes on MQTT, stores :data:`~monitor.records.schema.ESTIMATE_COLUMNS` in
    columns and every other key in ``detail`` under its own name; the readers give the
    flat form back (docs/recorder.md).

Reading
    ``read_*`` stream or list one table in id order, each on a connection of its own.
    :class:`LogReader` holds one read-only connection for a reader with many small
    questions (the board): each is answered from an index, so its cost grows with the
    answer and not with the log.
"""

from __future__ import annotations

import bisect
import hashlib
import hmac
import json
import logging
import math
import numbers
import os
import sqlite3
import struct
import time
import urllib.parse
from collections.abc import Callable, Collection, Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from types import TracebackType
from typing import Self

from drivers.channels import Quarantined
from drivers.errors import EbullioError, LogFormatError
from drivers.sample import Quality, Sample
from monitor.estimation.contracts import Level, Phase
from monitor.records.packs import (
    PACK_SAMPLES,
    QUALITY_CODES,
    Pack,
    decode_pack,
    encode_pack,
    pack_tail,
)
from monitor.records.schema import ESTIMATE_COLUMNS, join_estimate, split_estimate

LOG = logging.getLogger(__name__)

#: What ``meta.format`` holds in every recorder log.
LOG_FORMAT = "ebullio-recorder"
#: Version of the table layout new logs get; a log with a newer one is refused.
SCHEMA_VERSION = 2
#: The first bytes of every SQLite 3 database file.
SQLITE_MAGIC = b"SQLite format 3\x00"
#: ``prev_hash`` of block 1.
GENESIS_HASH = "0" * 64

_ESTIMATE_REALS = ",\n    ".join(f"{c} REAL" for c in ESTIMATE_COLUMNS)
#: The tables every schema version has, with their columns and their SQL.
_COMMON_COLUMNS: dict[str, tuple[str, ...]] = {
    "sessions": ("id", "block", "started_t", "version", "config_text"),
    "vessels": ("id", "block", "vessel", "metadata"),
    "runs": ("id", "block", "vessel", "run", "start_t", "end_t", "summary"),
    "quarantine": ("id", "block", "t", "source", "location", "reason", "raw"),
    "estimates": ("id", "block", "t", "vessel", "phase", *ESTIMATE_COLUMNS, "detail"),
    "flags": ("id", "block", "t", "vessel", "name", "level", "message", "evidence"),
    "events": ("id", "block", "t", "kind", "source", "detail"),
}
_TABLE_SQL: dict[str, str] = {
    "meta": "meta (key TEXT PRIMARY KEY, value TEXT NOT NULL)",
    "blocks": """blocks (
    block INTEGER PRIMARY KEY, committed_t REAL NOT NULL, rows INTEGER NOT NULL,
    prev_hash TEXT NOT NULL, hash TEXT NOT NULL
)""",
    "sessions": """sessions (
    id INTEGER PRIMARY KEY, block INTEGER NOT NULL, started_t REAL NOT NULL,
    version TEXT NOT NULL, config_text TEXT
)""",
    "vessels": """vessels (
    id INTEGER PRIMARY KEY, block INTEGER NOT NULL, vessel TEXT NOT NULL,
    metadata TEXT NOT NULL
)""",
    "runs": """runs (
    id INTEGER PRIMARY KEY, block INTEGER NOT NULL, vessel TEXT NOT NULL, run TEXT NOT NULL,
    start_t REAL NOT NULL, end_t REAL, summary TEXT NOT NULL
)""",
    "samples": """samples (
    id INTEGER PRIMARY KEY, block INTEGER NOT NULL, t REAL NOT NULL, vessel TEXT NOT NULL,
    channel TEXT NOT NULL, value REAL, quality TEXT NOT NULL, source TEXT NOT NULL
)""",
    "sample_vessels": """sample_vessels (
    id INTEGER PRIMARY KEY, block INTEGER NOT NULL, vessel TEXT NOT NULL
)""",
    "sample_series": """sample_series (
    id INTEGER PRIMARY KEY, block INTEGER NOT NULL, channel TEXT NOT NULL, source TEXT NOT NULL
)""",
    "sample_packs": """sample_packs (
    id INTEGER PRIMARY KEY, block INTEGER NOT NULL, vessel INTEGER NOT NULL,
    t_last REAL NOT NULL, n INTEGER NOT NULL, data BLOB NOT NULL
)""",
    "quarantine": """quarantine (
    id INTEGER PRIMARY KEY, block INTEGER NOT NULL, t REAL NOT NULL, source TEXT NOT NULL,
    location TEXT NOT NULL, reason TEXT NOT NULL, raw BLOB NOT NULL
)""",
    "estimates": f"""estimates (
    id INTEGER PRIMARY KEY, block INTEGER NOT NULL, t REAL NOT NULL, vessel TEXT NOT NULL,
    phase TEXT NOT NULL,
    {_ESTIMATE_REALS},
    detail TEXT NOT NULL
)""",
    "flags": """flags (
    id INTEGER PRIMARY KEY, block INTEGER NOT NULL, t REAL NOT NULL, vessel TEXT NOT NULL,
    name TEXT NOT NULL, level TEXT NOT NULL, message TEXT NOT NULL, evidence TEXT NOT NULL
)""",
    "events": """events (
    id INTEGER PRIMARY KEY, block INTEGER NOT NULL, t REAL NOT NULL, kind TEXT NOT NULL,
    source TEXT NOT NULL, detail TEXT NOT NULL
)""",
}


@dataclass(frozen=True)
class Layout:
    """One schema version's tables: their columns, in the order they are stored and
    hashed, the order the tables are hashed in, the label the hash starts with and the
    indices for readers (not hashed; they hold nothing of their own, so a writer adds
    any an older log of the version lacks)."""

    version: int
    hash_label: bytes
    table_columns: Mapping[str, tuple[str, ...]]
    indices: tuple[str, ...]

    @property
    def hashed_tables(self) -> tuple[str, ...]:
        """Return the hashed tables in the order a block hashes them."""
        return tuple(self.table_columns)

    def create_statements(self) -> list[str]:
        """Return the SQL that makes a new log of this version (tables, then indices)."""
        tables = ["meta", "blocks", *self.table_columns]
        return [f"CREATE TABLE {_TABLE_SQL[t]} STRICT" for t in tables] + list(self.indices)


def _columns(*names: str) -> dict[str, tuple[str, ...]]:
    return {n: _COMMON_COLUMNS[n] for n in names}


_ESTIMATE_INDEX = "CREATE INDEX IF NOT EXISTS estimates_by_vessel ON estimates (vessel, t)"
#: Schema version 1 (until 2026-12): one ``samples`` row per reading.
LAYOUT_V1 = Layout(
    version=1,
    hash_label=b"ebullio-recorder block v1\n",
    table_columns={
        **_columns("sessions", "vessels", "runs"),
        "samples": ("id", "block", "t", "vessel", "channel", "value", "quality", "source"),
        **_columns("quarantine", "estimates", "flags", "events"),
    },
    indices=(
        "CREATE INDEX IF NOT EXISTS samples_by_vessel ON samples (vessel, channel, t)",
        _ESTIMATE_INDEX,
    ),
)
#: Schema version 2: the readings as packs (:mod:`monitor.records.packs`), one per
#: vessel and block, with the vessels' names and the (channel, source) series in two
#: small tables the packs refer to by id.
LAYOUT_V2 = Layout(
    version=2,
    hash_label=b"ebullio-recorder block v2\n",
    table_columns={
        **_columns("sessions", "vessels", "runs"),
        "sample_vessels": ("id", "block", "vessel"),
        "sample_series": ("id", "block", "channel", "source"),
        "sample_packs": ("id", "block", "vessel", "t_last", "n", "data"),
        **_columns("quarantine", "estimates", "flags", "events"),
    },
    indices=(
        "CREATE INDEX IF NOT EXISTS sample_packs_by_vessel ON sample_packs (vessel, t_last)",
        _ESTIMATE_INDEX,
    ),
)
#: Every layout this ebullio reads, by schema version.
LAYOUTS: dict[int, Layout] = {1: LAYOUT_V1, 2: LAYOUT_V2}
#: The layout of new logs.
LAYOUT = LAYOUTS[SCHEMA_VERSION]
#: Label at the start of every block's hashed bytes in a new log (names the version).
HASH_LABEL = LAYOUT.hash_label
#: Columns of each hashed table of a new log, in the order they are stored and hashed
#: (the tables other than the samples' are the same in every version).
TABLE_COLUMNS: Mapping[str, tuple[str, ...]] = LAYOUT.table_columns
#: The order in which a new log's block hashes its tables.
HASHED_TABLES = LAYOUT.hashed_tables

_PACK_Q = struct.Struct(">q").pack
_PACK_D = struct.Struct(">d").pack
_PACK_I = struct.Struct(">I").pack
_NAN_BYTES = b"f" + _PACK_D(math.nan)
_QUALITIES = {str(q): q for q in Quality}

Row = tuple[object, ...]


# ---------------------------------------------------------------------------------------
# Canonical bytes and the block hash (pure)


def encode_value(value: object) -> bytes:
    """Return the canonical bytes of one column value (see the module docstring).

    ``None`` is ``n``; an int ``i`` + 8 bytes; a float ``f`` + 8 bytes (every NaN the
    same); a str (as UTF-8) or bytes ``x`` + a 4-byte length + the bytes. Raises
    TypeError for anything else (a bool included).
    """
    if value is None:
        return b"n"
    if isinstance(value, bool):
        raise TypeError(f"cannot hash a bool column value ({value!r})")
    if isinstance(value, float):
        return _NAN_BYTES if value != value else b"f" + _PACK_D(value)
    if isinstance(value, int):
        return b"i" + _PACK_Q(value)
    if isinstance(value, str):
        value = value.encode("utf-8")
    if isinstance(value, bytes | bytearray | memoryview):
        return b"x" + _PACK_I(len(value)) + bytes(value)
    raise TypeError(f"cannot hash a {type(value).__name__} column value ({value!r})")


def _encode_rows(rows: Iterable[Row], out: list[bytes]) -> None:
    # encode_value inlined, with repeated texts (vessel, channel, source) encoded once
    texts: dict[object, bytes] = {}
    for row in rows:
        for value in row:
            kind = type(value)
            if kind is float:
                out.append(_NAN_BYTES if value != value else b"f" + _PACK_D(value))
            elif kind is int:
                out.append(b"i" + _PACK_Q(value))
            elif value is None:
                out.append(b"n")
            elif kind is str or kind is bytes:
                encoded = texts.get(value)
                if encoded is None:
                    encoded = encode_value(value)
                    if len(texts) < 4096:
                        texts[value] = encoded
                out.append(encoded)
            else:
                out.append(encode_value(value))


def block_hash(
    block: int,
    committed_t: float,
    rows: int,
    prev_hash: str,
    tables: Mapping[str, Sequence[Row]],
    layout: Layout = LAYOUT,
) -> str:
    """Return the SHA-256 (64 hex digits) of one block: header, previous hash, rows.

    ``tables`` maps table names to that table's rows in the block, in id order, each a
    tuple of every column in the ``layout``'s order (:data:`TABLE_COLUMNS` for a new
    log); missing tables have no rows. Raises ValueError when ``prev_hash`` is not 64
    hex digits.
    """
    if len(prev_hash) != 64:
        raise ValueError(f"previous hash {prev_hash!r} is not 64 hex digits")
    digest = hashlib.sha256(layout.hash_label)
    digest.update(_PACK_Q(block) + _PACK_D(float(committed_t)) + _PACK_Q(rows))
    digest.update(bytes.fromhex(prev_hash))
    for name in layout.hashed_tables:
        table_rows = tables.get(name, ())
        parts = [encode_value(name), _PACK_Q(len(table_rows))]
        _encode_rows(table_rows, parts)
        digest.update(b"".join(parts))
    return digest.hexdigest()


# ---------------------------------------------------------------------------------------
# Normalising values on the way in (pure)


def _real(value: object, what: str) -> float | None:
    """Return a float as SQLite will give it back: NaN -> None, -0.0 -> 0.0."""
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise ValueError(f"{what} must be a number or None, got {value!r}")
    number = float(value)
    if number != number:
        return None
    return 0.0 if number == 0.0 else number


def _time(value: object, what: str) -> float:
    number = _real(value, what)
    if number is None or not math.isfinite(number):
        raise ValueError(f"{what} must be a finite Unix time in s, got {value!r}")
    return number


def _text(value: object, what: str) -> str:
    if not isinstance(value, str):
        raise ValueError(f"{what} must be a str, got {value!r}")
    try:
        value.encode("utf-8")
    except UnicodeEncodeError as exc:
        raise ValueError(f"{what} cannot be written as UTF-8 ({exc})") from None
    return value


def _json_safe(value: object, what: str) -> object:
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if value is None or isinstance(value, str | bool | int):
        return value
    if isinstance(value, Mapping):
        out = {}
        for key, item in value.items():
            if not isinstance(key, str):
                raise ValueError(f"{what}: key {key!r} is not a str")
            out[key] = _json_safe(item, what)
        return out
    if isinstance(value, list | tuple):
        return [_json_safe(item, what) for item in value]
    raise ValueError(f"{what}: {value!r} cannot be written as JSON")


def json_text(value: object, what: str = "value") -> str:
    """Return the canonical JSON text of ``value`` (sorted keys, non-finite numbers null).

    Raises ValueError naming ``what`` when the value holds something JSON cannot carry.
    """
    return json.dumps(
        _json_safe(value, what), sort_keys=True, separators=(",", ":"), ensure_ascii=False
    )


_PHASES = frozenset(str(p) for p in Phase)
_ESTIMATE_WHAT = {c: f"estimate {c}" for c in ESTIMATE_COLUMNS}


def _estimate_row(record: Mapping[str, object]) -> Row:
    """Return a flat estimate (:func:`monitor.records.schema.flatten_estimate`) as a table row."""
    columns, detail = split_estimate(record)
    for key in ("t", "vessel", "phase"):
        if key not in record:
            raise ValueError(f"estimate has no {key!r}")
    phase = _text(record["phase"], "estimate phase")
    if phase not in _PHASES:
        raise ValueError(f"estimate phase {phase!r} is not one of {sorted(_PHASES)}")
    return (
        _time(record["t"], "estimate t"),
        _text(record["vessel"], "estimate vessel"),
        phase,
        *(_real(v, _ESTIMATE_WHAT[c]) for c, v in zip(ESTIMATE_COLUMNS, columns, strict=True)),
        json_text(detail, "estimate detail"),
    )


def _flag_row(record: Mapping[str, object]) -> Row:
    known = {"t", "vessel", "name", "level", "message", "evidence"}
    unknown = sorted(set(record) - known)
    missing = sorted(known - {"evidence"} - set(record))
    if unknown or missing:
        raise ValueError(f"flag keys wrong (unknown {unknown}, missing {missing})")
    level = _text(str(record["level"]), "flag level")
    if level not in {str(v) for v in Level}:
        raise ValueError(f"flag level {level!r} is not one of {[str(v) for v in Level]}")
    return (
        _time(record["t"], "flag t"),
        _text(record["vessel"], "flag vessel"),
        _text(record["name"], "flag name"),
        level,
        _text(record["message"], "flag message"),
        json_text(record.get("evidence") or {}, "flag evidence"),
    )


def _raw_bytes(raw: object) -> bytes:
    if isinstance(raw, bytes | bytearray | memoryview):
        return bytes(raw)
    if isinstance(raw, str):
        return raw.encode("utf-8", errors="surrogateescape")
    raise ValueError(f"quarantined raw input must be bytes or str, got {type(raw).__name__}")


# ---------------------------------------------------------------------------------------
# The writer


class _ClosedOnExit:
    """``with`` for a class with ``close()``: the block's end closes it, whatever happened."""

    def close(self) -> None:
        raise NotImplementedError

    def __enter__(self) -> Self:
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self.close()


def _check_existing(path: Path) -> None:
    """Raise LogFormatError unless ``path`` is missing, empty or SQLite."""
    try:
        with open(path, "rb") as handle:
            head = handle.read(len(SQLITE_MAGIC))
    except FileNotFoundError:
        return
    except OSError as exc:
        raise LogFormatError(f"{path}: cannot be read ({exc})") from exc
    if head and head != SQLITE_MAGIC:
        raise LogFormatError(f"{path}: not an SQLite file, so not a recorder log; not touched")


class _SampleNames:
    """The names a schema-2 log's packs refer to by id: vessels and (channel, source) series.

    Loaded from a connection and topped up (:meth:`refresh`) when a pack names an id
    not yet seen: a writer may add names while a reader reads.
    """

    def __init__(self) -> None:
        self.vessel_ids: dict[str, int] = {}
        self.vessels: dict[int, str] = {}
        self.series_ids: dict[tuple[str, str], int] = {}
        self.series: dict[int, tuple[str, str]] = {}

    def copy(self) -> _SampleNames:
        """Return a copy that can grow without changing this one."""
        other = _SampleNames()
        other.vessel_ids, other.vessels = dict(self.vessel_ids), dict(self.vessels)
        other.series_ids, other.series = dict(self.series_ids), dict(self.series)
        return other

    def refresh(self, conn: sqlite3.Connection) -> Self:
        """Read the names added since the last refresh; return self."""
        last_vessel = max(self.vessels, default=0)
        for i, vessel in conn.execute(
            "SELECT id, vessel FROM sample_vessels WHERE id > ? ORDER BY id", (last_vessel,)
        ):
            self.vessels[i] = vessel
            self.vessel_ids.setdefault(vessel, i)
        last_series = max(self.series, default=0)
        for i, channel, source in conn.execute(
            "SELECT id, channel, source FROM sample_series WHERE id > ? ORDER BY id",
            (last_series,),
        ):
            self.series[i] = (channel, source)
            self.series_ids.setdefault((channel, source), i)
        return self

    def vessel_id(self, conn: sqlite3.Connection, vessel: str) -> int | None:
        """Return the id of ``vessel``, None when the log has no sample of it."""
        if vessel not in self.vessel_ids:
            self.refresh(conn)
        return self.vessel_ids.get(vessel)

    def channel_series(self, conn: sqlite3.Connection, channels: Collection[str]) -> set[int]:
        """Return the ids of every series of ``channels`` (from any source)."""
        self.refresh(conn)
        return {i for i, (channel, _) in self.series.items() if channel in channels}

    def name_of(
        self, conn: sqlite3.Connection, where: str, vessel: int, series: list[int]
    ) -> tuple[str, dict[int, tuple[str, str]]]:
        """Return (the vessel's name, a series id -> (channel, source) map) for one pack;
        raise ValueError naming an id the log does not hold."""
        if vessel not in self.vessels or any(i not in self.series for i in set(series)):
            self.refresh(conn)
        name = self.vessels.get(vessel)
        if name is None:
            raise ValueError(f"{where}: vessel id {vessel} is not in sample_vessels")
        missing = set(series) - set(self.series)
        if missing:
            raise ValueError(f"{where}: series id {min(missing)} is not in sample_series")
        return name, self.series


_QUALITY_OF_CODE = tuple(Quality(c) for c in QUALITY_CODES)
_CODE_OF_QUALITY = {c: i for i, c in enumerate(QUALITY_CODES)}


def _decoded(path: object, pack_id: int, n: int, data: bytes) -> Pack:
    """Return a stored pack decoded; LogFormatError naming it when it is not a pack."""
    try:
        return decode_pack(bytes(data), n)
    except (TypeError, ValueError) as exc:
        raise LogFormatError(f"{path}: sample_packs id {pack_id}: {exc}") from None


def _pack_samples(
    path: object, conn: sqlite3.Connection, names: _SampleNames, row: tuple
) -> list[tuple[int, Sample]]:
    """Return one ``sample_packs`` row (id, vessel, n, data) as (position, Sample) pairs."""
    pack_id, vessel_id, n, data = row
    pack = _decoded(path, pack_id, n, data)
    vessel, series = names.vessels.get(vessel_id), names.series
    try:
        columns = [(series[s], q) for s, q in zip(pack.series, pack.qualities, strict=True)]
    except KeyError:
        columns = None
    if vessel is None or columns is None:  # names added since they were read, or none such
        try:
            vessel, series = names.name_of(
                conn, f"sample_packs id {pack_id}", vessel_id, pack.series
            )
        except ValueError as exc:
            raise LogFormatError(f"{path}: {exc}") from None
        columns = [(series[s], q) for s, q in zip(pack.series, pack.qualities, strict=True)]
    qualities = _QUALITY_OF_CODE
    try:
        return [
            (p, Sample(t, vessel, channel, v, qualities[q], source))
            for p, t, ((channel, source), q), v in zip(
                pack.positions, pack.times, columns, pack.values, strict=True
            )
        ]
    except ValueError as exc:
        raise LogFormatError(f"{path}: sample_packs id {pack_id}: {exc}") from exc


def _packed_samples(
    path: object, conn: sqlite3.Connection, vessel: str | None
) -> Iterator[tuple[int, Sample]]:
    """Yield (block, sample) of a schema-2 log in recorded order, one vessel or all.

    A block's packs are read together and their samples put back in the order they
    arrived in (their positions), so the vessels interleave as they did.
    """
    names = _SampleNames().refresh(conn)
    sql = "SELECT block, id, vessel, n, data FROM sample_packs"
    params: tuple[object, ...] = ()
    if vessel is not None:
        vessel_id = names.vessel_id(conn, vessel)
        if vessel_id is None:
            return
        sql += " WHERE vessel = ?"
        params = (vessel_id,)
    cursor = conn.execute(sql + " ORDER BY id", params)
    pending: list[tuple[int, Sample]] = []
    block = None
    while True:
        chunk = cursor.fetchmany(1024)
        for row in chunk:
            if row[0] != block:
                if pending:
                    yield from ((block, s) for _, s in _in_order(pending, vessel))
                pending = []
                block = row[0]
            pending.extend(_pack_samples(path, conn, names, row[1:]))
        if not chunk:
            break
    yield from ((block, s) for _, s in _in_order(pending, vessel))


def _in_order(pairs: list[tuple[int, Sample]], vessel: str | None) -> list[tuple[int, Sample]]:
    """Return one block's (position, sample) pairs in arrival order."""
    if vessel is None:
        pairs.sort(key=lambda pair: pair[0])
    return pairs


def _newest_packed_t(
    conn: sqlite3.Connection,
    names: _SampleNames,
    vessel: str,
    channels: Collection[str],
    path: object,
) -> float | None:
    """Return the newest time (Unix s) of ``vessel``'s samples on ``channels`` in a
    schema-2 log, None for none: the vessel's packs newest first, until no older pack
    can hold a newer sample."""
    vessel_id = names.vessel_id(conn, vessel)
    wanted = names.channel_series(conn, channels)
    if vessel_id is None or not wanted:
        return None
    best: float | None = None
    for pack_id, t_last, n, data in conn.execute(
        "SELECT id, t_last, n, data FROM sample_packs WHERE vessel = ? ORDER BY t_last DESC",
        (vessel_id,),
    ):
        if best is not None and t_last <= best:
            break
        pack = _decoded(path, pack_id, n, data)
        for t, s in zip(pack.times, pack.series, strict=True):
            if s in wanted and (best is None or t > best):
                best = t
    return best


def _last_packed_t(conn: sqlite3.Connection, path: object) -> float | None:
    """Return the time (Unix s) of the sample a schema-2 log recorded last, None for none:
    among the packs of the last block (the highest ids, since a commit writes its packs
    together), the time of the one with the highest position."""
    last: tuple[int, float] | None = None
    block = None
    for pack_id, pack_block, data in conn.execute(
        "SELECT id, block, data FROM sample_packs ORDER BY id DESC"
    ):
        if block is None:
            block = pack_block
        elif pack_block != block:
            break
        try:
            tail = pack_tail(bytes(data))
        except (TypeError, ValueError) as exc:
            raise LogFormatError(f"{path}: sample_packs id {pack_id}: {exc}") from None
        if last is None or tail[0] > last[0]:
            last = tail
    return None if last is None else last[1]


class Recorder(_ClosedOnExit):
    """Writes one log: rows pile up in memory and :meth:`commit` writes them as one block.

    Opening creates the file and its tables when new, and records this session
    (start time, ``version``, ``config_text``) as a block of its own at once. Use it
    as a context manager: leaving it commits what is pending and closes the file.
    ``clock`` gives Unix time in s (session start and commit times; injected in tests).

    A new log gets the layout of ``schema_version`` (:data:`SCHEMA_VERSION` unless a
    test or a benchmark asks for an older one); an existing log keeps its own, so a
    log of schema version 1 goes on growing in version 1 (docs/recorder.md).

    Raises :class:`LogFormatError` when the file exists but is not a recorder log, or
    has a newer schema; :class:`EbullioError` when SQLite cannot open or write it.
    """

    def __init__(
        self,
        path: str | os.PathLike[str],
        *,
        version: str,
        config_text: str | None = None,
        clock: Callable[[], float] = time.time,
        key: bytes | None = None,
        schema_version: int = SCHEMA_VERSION,
    ) -> None:
        self.path = Path(path)
        self._clock = clock
        self._key = key  # signs the head file (HMAC-SHA-256) when given
        if schema_version not in LAYOUTS:
            raise ValueError(f"schema version {schema_version} is not one of {sorted(LAYOUTS)}")
        #: the layout of the log (its own when it existed, else ``schema_version``'s)
        self.layout = LAYOUTS[schema_version]
        self._names = _SampleNames()  # schema 2: the names packs refer to, as committed
        self._pending: dict[str, list[Row]] = {name: [] for name in (*_COMMON_COLUMNS, "samples")}
        self._count = 0
        self.last_block: int | None = None
        #: the chain head after the last commit (:func:`head_record`), None before one
        self.last_head: dict[str, object] | None = None
        #: samples not added again by ``add_samples(..., once_from=...)``
        self.repeats_skipped = 0
        self._latest_t: dict[tuple[object, object], float] = {}  # (vessel, channel) -> t
        _check_existing(self.path)
        try:
            self._conn = sqlite3.connect(
                self.path, isolation_level=None, check_same_thread=False, timeout=10.0
            )
        except sqlite3.Error as exc:
            raise EbullioError(f"{self.path}: cannot open the log ({exc})") from exc
        try:
            started_t = _time(self._clock(), "session start")
            self._prepare(started_t)
            self._pending["sessions"].append(
                (
                    started_t,
                    _text(version, "version"),
                    None if config_text is None else _text(config_text, "config text"),
                )
            )
            self._count = 1
            self.commit()
        except BaseException:
            self._conn.close()
            raise
        self.session_block = self.last_block

    def _prepare(self, created_t: float) -> None:
        conn = self._conn
        try:
            # a foreign SQLite file is refused before anything (WAL mode included) touches it
            if conn.execute("SELECT count(*) FROM sqlite_schema").fetchone()[0]:
                self.layout = LAYOUTS[_check_meta(conn, str(self.path))]
            mode = conn.execute("PRAGMA journal_mode=WAL").fetchone()[0]
            if mode != "wal":
                raise EbullioError(f"{self.path}: SQLite would not use WAL mode (got {mode!r})")
            conn.execute("PRAGMA synchronous=FULL")  # why FULL: see the module docstring
            conn.execute("BEGIN IMMEDIATE")
            try:
                # looked at again under the write lock: another process may have made it
                if conn.execute("SELECT count(*) FROM sqlite_schema").fetchone()[0]:
                    self.layout = LAYOUTS[_check_meta(conn, str(self.path))]
                else:
                    for statement in self.layout.create_statements():
                        conn.execute(statement)
                    conn.executemany(
                        "INSERT INTO meta (key, value) VALUES (?, ?)",
                        [
                            ("format", LOG_FORMAT),
                            ("schema_version", str(self.layout.version)),
                            ("created_t", repr(created_t)),
                        ],
                    )
                for statement in self.layout.indices:
                    conn.execute(statement)
                conn.execute("COMMIT")
            except BaseException:
                conn.execute("ROLLBACK")
                raise
        except sqlite3.Error as exc:
            raise EbullioError(f"{self.path}: cannot prepare the log ({exc})") from exc

    # -- adding rows (nothing is written until commit) --------------------------------

    def _add(self, table: str, rows: list[Row]) -> int:
        self._pending[table].extend(rows)
        self._count += len(rows)
        return len(rows)

    def add_samples(self, samples: Iterable[Sample], *, once_from: Collection[str] = ()) -> int:
        """Return how many samples were added to the pending block.

        The whole batch is checked first: a sample with a non-finite time or a
        field of the wrong type raises ValueError and nothing of the batch is added.
        A sample from a source in ``once_from`` that the log already holds (pending or
        committed: the same vessel, channel, time and value) is not added again and is
        counted in :attr:`repeats_skipped`: a broker that delivers a QoS 1 message
        again after a crash or a lost link (the live service acknowledges only after
        the commit) has its readings recorded once. Other sources' samples are all
        kept, twins included. Only a sample not later than its channel's latest is
        looked up, so the cost is in the rare repeats, not in every sample.
        """
        rows = []
        for s in samples:
            t = s.t
            if type(t) is not float or not math.isfinite(t) or t == 0.0:
                t = _time(t, f"sample t ({s!r})")
            value = s.value
            if type(value) is not float or value != value or value == 0.0:
                value = _real(value, f"sample value ({s!r})")
            vessel, channel, source = s.vessel, s.channel, s.source
            if not (type(vessel) is str and type(channel) is str and type(source) is str):
                vessel = _text(vessel, f"sample vessel ({s!r})")
                channel = _text(channel, f"sample channel ({s!r})")
                source = _text(source, f"sample source ({s!r})")
            quality = str(s.quality)
            if quality not in _QUALITIES:
                raise ValueError(f"sample quality {quality!r} is not one of {list(_QUALITIES)}")
            rows.append((t, vessel, channel, value, quality, source))
        if once_from:
            rows = self._without_repeats(rows, once_from)
        return self._add("samples", rows)

    def _without_repeats(self, rows: list[Row], once_from: Collection[str]) -> list[Row]:
        kept: list[Row] = []
        latest = self._latest_t
        for row in rows:
            t, key = row[0], (row[1], row[2])
            last = latest.get(key)
            if last is None:
                found = self._newest_t(*key)  # type: ignore[arg-type]
                last = -math.inf if found is None else found
            if t <= last and row[5] in once_from and self._holds(row, kept):  # type: ignore[operator]
                self.repeats_skipped += 1
                continue
            latest[key] = max(last, t)  # type: ignore[type-var]
            kept.append(row)
        return kept

    def _holds(self, row: Row, batch: list[Row]) -> bool:
        """Return True if ``row``'s sample is in ``batch``, the pending block or the log."""
        head = row[:4]
        if any(r[:4] == head for r in batch) or any(
            r[:4] == head for r in self._pending["samples"]
        ):
            return True
        t, vessel, channel, value = head
        if self.layout.version == 1:
            return (
                self._conn.execute(
                    "SELECT 1 FROM samples WHERE vessel = ? AND channel = ? AND t = ? "
                    "AND value IS ? LIMIT 1",
                    (vessel, channel, t, value),
                ).fetchone()
                is not None
            )
        # schema 2: the vessel's packs that end at or after t (a repeat is a recent reading)
        vessel_id = self._names.vessel_id(self._conn, vessel)  # type: ignore[arg-type]
        wanted = self._names.channel_series(self._conn, (channel,))
        if vessel_id is None or not wanted:
            return False
        for pack_id, n, data in self._conn.execute(
            "SELECT id, n, data FROM sample_packs WHERE vessel = ? AND t_last >= ? ORDER BY t_last",
            (vessel_id, t),
        ):
            pack = _decoded(self.path, pack_id, n, data)
            for pt, ps, pv in zip(pack.times, pack.series, pack.values, strict=True):
                if pt == t and ps in wanted and (pv == value or (pv != pv and value is None)):
                    return True
        return False

    def _newest_t(self, vessel: str, channel: str) -> float | None:
        """Return the newest committed time (Unix s) of a vessel's channel, None for none."""
        if self.layout.version == 1:
            return self._conn.execute(
                "SELECT max(t) FROM samples WHERE vessel = ? AND channel = ?", (vessel, channel)
            ).fetchone()[0]
        return _newest_packed_t(self._conn, self._names, vessel, (channel,), self.path)

    def add_quarantined(self, items: Iterable[Quarantined]) -> int:
        """Return how many quarantined inputs were added (raw kept byte for byte)."""
        rows = [
            (
                _time(q.t, "quarantined t"),
                _text(q.source, "quarantined source"),
                _text(q.where, "quarantined where"),
                _text(q.reason, "quarantined reason"),
                _raw_bytes(q.raw),
            )
            for q in items
        ]
        return self._add("quarantine", rows)

    def add_estimates(self, records: Iterable[Mapping[str, object]]) -> int:
        """Return how many estimate rows were added.

        Each record is an estimate's flat form (:func:`monitor.records.schema.flatten_estimate`):
        ``t`` (Unix s), ``vessel`` and ``phase`` are required; the fields of
        :data:`~monitor.records.schema.ESTIMATE_COLUMNS` go in their columns (missing ones are
        NULL) and every other key in ``detail`` (JSON) under its own name. A key the flat
        form does not have raises ValueError, and nothing of the batch is added.
        """
        return self._add("estimates", [_estimate_row(r) for r in records])

    def add_flags(self, records: Iterable[Mapping[str, object]]) -> int:
        """Return how many flag rows were added.

        Keys: ``t`` (Unix s), ``vessel``, ``name``, ``level``, ``message`` and
        optionally ``evidence`` (JSON); see :func:`flag_record`.
        """
        return self._add("flags", [_flag_row(r) for r in records])

    def add_event(
        self, t: float, kind: str, source: str, detail: str | Mapping[str, object] = ""
    ) -> int:
        """Return 1 after adding an event (a gap, a reconnect, a back-pressure count).

        ``detail`` is stored as JSON (a str becomes a JSON string).
        """
        row = (
            _time(t, "event t"),
            _text(kind, "event kind"),
            _text(source, "event source"),
            json_text(detail, "event detail"),
        )
        return self._add("events", [row])

    def add_vessel(self, vessel: str, metadata: Mapping[str, str | float]) -> int:
        """Return 1 after adding a vessel's ``key: value`` metadata (a later row replaces it).

        Values must be str or finite numbers: they are what a replay configures from.
        """
        for key, value in metadata.items():
            ok = isinstance(value, str) or (
                isinstance(value, int | float)
                and not isinstance(value, bool)
                and math.isfinite(value)
            )
            if not isinstance(key, str) or not ok:
                raise ValueError(f"vessel {vessel!r} metadata {key!r}: {value!r} is not usable")
        row = (_text(vessel, "vessel"), json_text(dict(metadata), f"vessel {vessel!r} metadata"))
        return self._add("vessels", [row])

    def add_run(
        self,
        vessel: str,
        run: str,
        start_t: float,
        end_t: float | None = None,
        summary: Mapping[str, object] | None = None,
    ) -> int:
        """Return 1 after adding a run (times Unix s; ``end_t`` None while it is open)."""
        row = (
            _text(vessel, "run vessel"),
            _text(run, "run label"),
            _time(start_t, "run start_t"),
            None if end_t is None else _time(end_t, "run end_t"),
            json_text(summary or {}, "run summary"),
        )
        return self._add("runs", [row])

    def pending(self) -> int:
        """Return the number of rows added and not yet committed."""
        return self._count

    # -- committing -----------------------------------------------------------------

    def commit(self) -> int | None:
        """Return the number of the block just written, or None when nothing was pending.

        All pending rows and the block row go in one transaction: after a crash the
        block is either wholly there or not at all. On an SQLite error the
        transaction is rolled back, the rows stay pending (a later commit may
        succeed) and :class:`EbullioError` is raised.
        """
        if not self._count:
            return None
        conn = self._conn
        committed_t = _time(self._clock(), "commit time")
        try:
            conn.execute("BEGIN IMMEDIATE")
            try:
                last = conn.execute(
                    "SELECT block, hash FROM blocks ORDER BY block DESC LIMIT 1"
                ).fetchone()
                block, prev_hash = (1, GENESIS_HASH) if last is None else (last[0] + 1, last[1])
                stored: Mapping[str, list[Row]] = self._pending
                names = None
                if self.layout.version >= 2:
                    stored, names = self._packed(conn)
                written: dict[str, list[Row]] = {}
                for name in self.layout.hashed_tables:
                    rows = stored.get(name)
                    if not rows:
                        continue
                    base = conn.execute(f"SELECT coalesce(max(id), 0) FROM {name}").fetchone()[0]
                    full = [(base + i, block, *row) for i, row in enumerate(rows, start=1)]
                    columns = self.layout.table_columns[name]
                    marks = ", ".join("?" * len(columns))
                    conn.executemany(
                        f"INSERT INTO {name} ({', '.join(columns)}) VALUES ({marks})", full
                    )
                    written[name] = full
                count = sum(len(rows) for rows in written.values())
                digest = block_hash(block, committed_t, count, prev_hash, written, self.layout)
                conn.execute(
                    "INSERT INTO blocks (block, committed_t, rows, prev_hash, hash) "
                    "VALUES (?, ?, ?, ?, ?)",
                    (block, committed_t, count, prev_hash, digest),
                )
                conn.execute("COMMIT")
            except BaseException:
                if conn.in_transaction:
                    conn.execute("ROLLBACK")
                raise
        except sqlite3.Error as exc:
            raise EbullioError(
                f"{self.path}: commit failed ({exc}); {self._count} rows are still pending"
            ) from exc
        for rows in self._pending.values():
            rows.clear()
        self._count = 0
        if names is not None:
            self._names = names
        self.last_block = block
        self._write_head(block, digest, committed_t)
        return block

    def _packed(self, conn: sqlite3.Connection) -> tuple[dict[str, list[Row]], _SampleNames]:
        """Return the pending rows with the samples as schema 2 stores them, and the names
        the log will hold once they are committed.

        Inside the commit's transaction: the names other writers committed are read
        first, so ids stay unique. A block's samples go in one pack per vessel (more
        when a vessel has over :data:`~monitor.records.packs.PACK_SAMPLES`), in order of
        each vessel's first sample, each sample with its position among the block's.
        """
        names = self._names.copy().refresh(conn)
        new_vessels: list[Row] = []
        new_series: list[Row] = []
        groups: dict[int, tuple[list, list, list, list, list]] = {}
        vessel_ids, series_ids, codes = names.vessel_ids, names.series_ids, _CODE_OF_QUALITY
        for position, (t, vessel, channel, value, quality, source) in enumerate(
            self._pending["samples"]
        ):
            vessel_id = vessel_ids.get(vessel)  # type: ignore[arg-type]
            if vessel_id is None:
                vessel_id = vessel_ids[vessel] = max(names.vessels, default=0) + 1  # type: ignore[index]
                names.vessels[vessel_id] = vessel  # type: ignore[assignment]
                new_vessels.append((vessel,))
            series_id = series_ids.get((channel, source))  # type: ignore[arg-type]
            if series_id is None:
                series_id = series_ids[(channel, source)] = max(names.series, default=0) + 1  # type: ignore[index]
                names.series[series_id] = (channel, source)  # type: ignore[assignment]
                new_series.append((channel, source))
            group = groups.get(vessel_id)
            if group is None:
                group = groups[vessel_id] = ([], [], [], [], [])
            group[0].append(position)
            group[1].append(t)
            group[2].append(series_id)
            group[3].append(codes[quality])  # type: ignore[index]
            group[4].append(math.nan if value is None else value)
        packs: list[Row] = []
        for vessel_id, columns in groups.items():
            for start in range(0, len(columns[0]), PACK_SAMPLES):
                part = [c[start : start + PACK_SAMPLES] for c in columns]
                packs.append((vessel_id, max(part[1]), len(part[0]), encode_pack(*part)))
        stored = {name: rows for name, rows in self._pending.items() if name != "samples"}
        stored.update(sample_vessels=new_vessels, sample_series=new_series, sample_packs=packs)
        return stored, names

    def _write_head(self, block: int, digest: str, committed_t: float) -> None:
        """Keep the chain's head beside the log (:func:`head_path`), replaced atomically.

        Written after the block is durable, so the file never names a block the log
        lacks; a log cut short (its last blocks removed) then fails :func:`verify`.
        With a key the head is signed, so it cannot be rewritten to match a cut log
        without the key. A head that cannot be written is logged, never raised: the
        readings come first.
        """
        head = head_record(block, digest, committed_t, self._key)
        self.last_head = head
        target = head_path(self.path)
        temporary = target.with_name(target.name + ".tmp")
        try:
            temporary.write_text(json.dumps(head) + "\n", encoding="utf-8")
            os.replace(temporary, target)
        except OSError as exc:
            LOG.warning("%s: cannot write the chain head (%s)", target, exc)

    def close(self) -> None:
        """Commit what is pending, then close the file (closing twice does nothing)."""
        if self._conn is None:
            return
        try:
            self.commit()
        finally:
            self._conn.close()
            self._conn = None  # type: ignore[assignment]


# ---------------------------------------------------------------------------------------
# Reading


def _ro_uri(path: Path) -> str:
    return "file:" + urllib.parse.quote(str(path.resolve())) + "?mode=ro"


def _check_meta(conn: sqlite3.Connection, name: str) -> int:
    """Return the log's schema version; raise LogFormatError when it is not a log this
    ebullio reads."""
    try:
        meta = dict(conn.execute("SELECT key, value FROM meta").fetchall())
    except sqlite3.OperationalError as exc:
        raise LogFormatError(f"{name}: an SQLite file but not a recorder log ({exc})") from exc
    fmt = meta.get("format")
    fmt = fmt.decode("utf-8", "replace") if isinstance(fmt, bytes) else fmt
    if fmt != LOG_FORMAT:
        raise LogFormatError(f"{name}: an SQLite file but not a recorder log (format {fmt!r})")
    raw_version = meta.get("schema_version", b"")
    if isinstance(raw_version, bytes):
        raw_version = raw_version.decode("utf-8", "replace")
    try:
        version = int(raw_version)
    except (TypeError, ValueError):
        raise LogFormatError(f"{name}: schema version {raw_version!r} is not a number") from None
    if version > SCHEMA_VERSION:
        raise LogFormatError(
            f"{name}: schema version {version} is newer than this ebullio's {SCHEMA_VERSION}"
        )
    if version not in LAYOUTS:
        raise LogFormatError(f"{name}: schema version {version} is not one this ebullio reads")
    return version


def _open_log(path: str | os.PathLike[str]) -> tuple[sqlite3.Connection, Layout]:
    """Return a read-only connection to a recorder log and the log's layout; raise
    LogFormatError otherwise."""
    path = Path(path)
    try:
        with open(path, "rb") as handle:
            head = handle.read(len(SQLITE_MAGIC))
    except OSError as exc:
        raise LogFormatError(f"{path}: cannot be read ({exc})") from exc
    if head != SQLITE_MAGIC:
        raise LogFormatError(f"{path}: not an SQLite file, so not a recorder log")
    try:
        conn = sqlite3.connect(_ro_uri(path), uri=True, check_same_thread=False)
    except sqlite3.Error as exc:
        raise LogFormatError(f"{path}: SQLite cannot open it ({exc})") from exc
    try:
        version = _check_meta(conn, str(path))
    except (LogFormatError, sqlite3.Error) as exc:
        conn.close()
        if isinstance(exc, LogFormatError):
            raise
        raise LogFormatError(f"{path}: SQLite cannot read it ({exc})") from exc
    return conn, LAYOUTS[version]


def _open_reader(path: str | os.PathLike[str]) -> sqlite3.Connection:
    """Return a read-only connection to a recorder log; raise LogFormatError otherwise."""
    return _open_log(path)[0]


def schema_version(path: str | os.PathLike[str]) -> int:
    """Return a recorder log's schema version; raise LogFormatError when it is not one."""
    conn, layout = _open_log(path)
    conn.close()
    return layout.version


def is_recorder_log(path: str | os.PathLike[str]) -> bool:
    """Return True when ``path`` is an SQLite file with a recorder ``meta`` table."""
    try:
        _open_reader(path).close()
    except LogFormatError:
        return False
    return True


def _rows(path: str | os.PathLike[str], sql: str, params: Sequence[object] = ()) -> Iterator[tuple]:
    """Yield the rows of a query over a log, mapping SQLite errors to LogFormatError."""
    conn = _open_reader(path)
    try:
        cursor = conn.execute(sql, params)
        while True:
            chunk = cursor.fetchmany(4096)
            if not chunk:
                return
            yield from chunk
    except sqlite3.Error as exc:
        raise LogFormatError(f"{path}: SQLite cannot read it ({exc})") from exc
    finally:
        conn.close()


def _samples_from(
    path: str | os.PathLike[str], rows: Iterator[tuple]
) -> Iterator[tuple[int, Sample]]:
    """Yield (block, sample) from schema-1 ``samples`` rows (block, id, and the sample)."""
    qualities, nan = _QUALITIES, math.nan
    for block, row_id, t, vessel, channel, value, quality, source in rows:
        q = qualities.get(quality)
        if q is None:
            raise LogFormatError(f"{path}: samples id {row_id}: unknown quality {quality!r}")
        try:
            yield block, Sample(t, vessel, channel, nan if value is None else value, q, source)
        except ValueError as exc:
            raise LogFormatError(f"{path}: samples id {row_id}: {exc}") from exc


def _samples_by_block(
    path: str | os.PathLike[str], vessel: str | None
) -> Iterator[tuple[int, Sample]]:
    """Return an iterator of (block, sample) in recorded order, one vessel or all, whatever
    the log's layout: the one place that turns stored readings into samples.

    Raises LogFormatError at once when the file is not a recorder log, and while
    iterating when a stored reading cannot be a Sample.
    """
    conn, layout = _open_log(path)
    if layout.version == 1:
        conn.close()
        sql = "SELECT block, id, t, vessel, channel, value, quality, source FROM samples"
        params: tuple[object, ...] = ()
        if vessel is not None:
            sql += " WHERE vessel = ?"
            params = (vessel,)
        return _samples_from(path, _rows(path, sql + " ORDER BY id", params))

    def packed() -> Iterator[tuple[int, Sample]]:
        try:
            yield from _packed_samples(path, conn, vessel)
        except sqlite3.Error as exc:
            raise LogFormatError(f"{path}: SQLite cannot read it ({exc})") from exc
        finally:
            conn.close()

    return packed()


def read_samples(path: str | os.PathLike[str], vessel: str | None = None) -> Iterator[Sample]:
    """Return an iterator of the log's samples in recorded order, one vessel or all.

    A fault's value (NULL in schema 1, NaN in a pack) reads back as NaN. Raises
    LogFormatError at once when the file is not a recorder log, and while iterating
    when a stored reading cannot be a Sample.
    """
    return (sample for _, sample in _samples_by_block(path, vessel))


def last_sample_t(path: str | os.PathLike[str]) -> float | None:
    """Return the time stamp (Unix s) of the sample recorded last, or None for a file that
    does not exist yet, is not a recorder log, or holds no sample."""
    if not os.path.exists(path) or not is_recorder_log(path):
        return None
    with LogReader(path) as log:
        return log.last_sample_t()


def read_samples_by_session(
    path: str | os.PathLike[str], vessel: str | None = None
) -> Iterator[tuple[int, Sample]]:
    """Return an iterator of (session, sample) in recorded order, one vessel or all.

    ``session`` counts the processes of the live service that wrote the log (a
    ``sessions`` row with the configuration, 0 for samples before the first one):
    a restart of the service is where the live filters started afresh, so a replay
    starts afresh there too. A writer that recorded no configuration (``replay
    --record``) is not a session of the service.
    """
    sql = "SELECT block FROM sessions WHERE config_text IS NOT NULL ORDER BY block"
    starts = [b for (b,) in _rows(path, sql)]
    for block, sample in _samples_by_block(path, vessel):
        yield bisect.bisect_right(starts, block), sample


def _load_json(path: object, table: str, row_id: int, text: str) -> object:
    try:
        return json.loads(text)
    except (TypeError, ValueError) as exc:
        raise LogFormatError(f"{path}: {table} id {row_id}: not JSON ({exc})") from exc


def read_vessels(path: str | os.PathLike[str]) -> dict[str, dict[str, object]]:
    """Return each vessel's metadata (the latest row per vessel), in first-seen order."""
    out: dict[str, dict[str, object]] = {}
    for row_id, vessel, text in _rows(path, "SELECT id, vessel, metadata FROM vessels ORDER BY id"):
        metadata = _load_json(path, "vessels", row_id, text)
        if not isinstance(metadata, dict):
            raise LogFormatError(f"{path}: vessels id {row_id}: metadata is not an object")
        out[vessel] = metadata
    return out


def _records(
    path: object, table: str, rows: Iterable[tuple], json_columns: Sequence[str] = ()
) -> Iterator[dict]:
    """Yield rows of every column of ``table`` as dicts keyed by column, JSON parsed."""
    columns = TABLE_COLUMNS[table]
    for row in rows:
        record = dict(zip(columns, row, strict=True))
        for column in json_columns:
            record[column] = _load_json(path, table, record["id"], record[column])
        yield record


def _dicts(
    path: str | os.PathLike[str],
    table: str,
    json_columns: Sequence[str],
    vessel: str | None = None,
) -> Iterator[dict]:
    where = "" if vessel is None else " WHERE vessel = ?"
    sql = f"SELECT {', '.join(TABLE_COLUMNS[table])} FROM {table}{where} ORDER BY id"
    rows = _rows(path, sql, () if vessel is None else (vessel,))
    return _records(path, table, rows, json_columns)


def _flat_estimate(path: object, record: dict[str, object]) -> dict[str, object]:
    """Return an estimate row (dict keyed by column, ``detail`` as JSON text) in its flat form."""
    detail = _load_json(path, "estimates", record["id"], record.pop("detail"))  # type: ignore[arg-type]
    if not isinstance(detail, dict):
        raise LogFormatError(f"{path}: estimates id {record['id']}: detail is not an object")
    return join_estimate(record, detail)


def read_quarantine(path: str | os.PathLike[str]) -> list[dict[str, object]]:
    """Return the quarantined inputs in id order: id, block, t (Unix s), source, location,
    reason and raw (bytes, as received)."""
    return list(_dicts(path, "quarantine", ()))


def read_estimates(
    path: str | os.PathLike[str], vessel: str | None = None
) -> Iterator[dict[str, object]]:
    """Return an iterator of the estimates in id order, one vessel or all.

    Each is the flat form the service published (:func:`monitor.records.schema.flatten_estimate`:
    ``t`` Unix s, ``vessel``, ``run``, ``phase``, the figures, ``flags``), with the row's
    ``id`` and ``block``: its columns and its ``detail`` joined
    (:func:`monitor.records.schema.join_estimate`).
    """
    _open_reader(path).close()  # refuse a wrong file now, not at the first next()
    return (_flat_estimate(path, r) for r in _dicts(path, "estimates", (), vessel))


def read_flags(path: str | os.PathLike[str]) -> list[dict[str, object]]:
    """Return the flags in id order (dicts keyed by column; ``evidence`` parsed)."""
    return list(_dicts(path, "flags", ("evidence",)))


def read_events(path: str | os.PathLike[str]) -> list[dict[str, object]]:
    """Return the events in id order (dicts keyed by column; ``detail`` parsed)."""
    return list(_dicts(path, "events", ("detail",)))


def read_runs(path: str | os.PathLike[str]) -> list[dict[str, object]]:
    """Return the runs in id order (times Unix s; ``summary`` parsed)."""
    with LogReader(path) as log:
        return log.runs()


def sessions(path: str | os.PathLike[str]) -> list[dict[str, object]]:
    """Return the sessions that wrote the log, oldest first (started_t Unix s, version,
    config_text)."""
    return list(_dicts(path, "sessions", ()))


#: What :meth:`LogReader.estimates` selects: the columns of the flat form, no ``detail``.
_THIN_ESTIMATE = ("t", "vessel", "phase", *ESTIMATE_COLUMNS)
#: Estimates asked for by id in one statement (SQLite allows 32,766 variables; the
#: chunk keeps each statement small).
_ID_CHUNK = 500


class LogReader(_ClosedOnExit):
    """One read-only connection to a recorder log, for a reader with many small questions.

    The board asks these every few seconds while ``ebullio run`` writes the log (WAL:
    a reader neither waits for the writer nor holds it up). Each question is answered
    from an index, so its cost grows with the answer, not with the log: in schema 2
    the packs' ``(vessel, t_last)`` index (a window's packs are read and unpacked once
    for all its channels), in schema 1 the samples' ``(vessel, channel, t)`` index, the
    estimates' ``(vessel, t)`` index (:attr:`Layout.indices`), and the ids. Use it as
    a context manager, one per callback; it is never shared between threads.

    Raises :class:`LogFormatError` when the file is not a recorder log, and from any
    question SQLite cannot answer.
    """

    def __init__(self, path: str | os.PathLike[str]) -> None:
        self.path = Path(path)
        self._conn, self.layout = _open_log(self.path)
        self._names = _SampleNames()
        # schema 2: the last window read, (vessel, since, op) -> [(t, series, value)]
        self._window: tuple[tuple[str, float, str], list[tuple[float, int, float]]] | None = None

    def close(self) -> None:
        """Close the connection (closing twice does nothing)."""
        self._conn.close()

    def _all(self, sql: str, params: Sequence[object] = ()) -> list[tuple]:
        try:
            return self._conn.execute(sql, params).fetchall()
        except sqlite3.Error as exc:
            raise LogFormatError(f"{self.path}: SQLite cannot read it ({exc})") from exc

    def _packed(self, ask: Callable[[], object]) -> object:
        """Return ``ask()``, a schema-2 question, with SQLite's errors as LogFormatError."""
        try:
            return ask()
        except sqlite3.Error as exc:
            raise LogFormatError(f"{self.path}: SQLite cannot read it ({exc})") from exc

    def vessels(self) -> list[str]:
        """Return the vessels, sorted: those with metadata rows, else those with samples.

        The service declares every vessel in ``vessels``; a log without such rows is
        scanned for the samples' vessels instead.
        """
        names = [v for (v,) in self._all("SELECT DISTINCT vessel FROM vessels ORDER BY vessel")]
        table = "samples" if self.layout.version == 1 else "sample_vessels"
        return names or [
            v for (v,) in self._all(f"SELECT DISTINCT vessel FROM {table} ORDER BY vessel")
        ]

    def last_sample_t(self) -> float | None:
        """Return the time (Unix s) of the sample recorded last, None for none."""
        if self.layout.version >= 2:
            return self._packed(lambda: _last_packed_t(self._conn, self.path))  # type: ignore[return-value]
        rows = self._all("SELECT t FROM samples ORDER BY id DESC LIMIT 1")
        return rows[0][0] if rows else None

    def newest_sample_t(self, vessel: str, channels: Iterable[str]) -> float | None:
        """Return the newest sample time (Unix s) of ``vessel`` over ``channels``, None for none.

        Schema 1: one ``max(t)`` per channel, each a single probe of the samples' index;
        ``max(t)`` over the vessel as a whole would read all its index entries (245 ms
        on a week). Schema 2: the vessel's packs from the newest, until none older can
        hold a newer sample (the first one, as a rule; every pack of the vessel when it
        has none of ``channels``).
        """
        channels = tuple(channels)
        if self.layout.version >= 2:
            return self._packed(  # type: ignore[return-value]
                lambda: _newest_packed_t(self._conn, self._names, vessel, channels, self.path)
            )
        sql = "SELECT max(t) FROM samples WHERE vessel = ? AND channel = ?"
        ends = [self._all(sql, (vessel, channel))[0][0] for channel in channels]
        return max((e for e in ends if e is not None), default=None)

    def readings(
        self, vessel: str, channel: str, since: float, *, newer_only: bool = False
    ) -> tuple[list[float], list[float | None]]:
        """Return the times (Unix s) and values of one channel from ``since`` on, in time order.

        With ``newer_only`` only samples after ``since``. A fault's value is None.
        Samples of one time keep their recorded order.
        """
        op = ">" if newer_only else ">="
        if self.layout.version >= 2:
            wanted = self._packed(lambda: self._names.channel_series(self._conn, (channel,)))
            rows = [(t, v) for t, s, v in self._window_of(vessel, since, op) if s in wanted]  # type: ignore[operator]
            rows.sort(key=lambda r: r[0])
            return [t for t, _ in rows], [None if v != v else v for _, v in rows]
        rows = self._all(
            f"SELECT t, value FROM samples WHERE vessel = ? AND channel = ? AND t {op} ? "
            "ORDER BY t",
            (vessel, channel, since),
        )
        return [r[0] for r in rows], [r[1] for r in rows]

    def _window_of(self, vessel: str, since: float, op: str) -> list[tuple[float, int, float]]:
        """Return (t, series, value) of a vessel's samples from ``since`` on (``op`` ``>=``
        or ``>``), in recorded order: its packs that end there or later, unpacked once
        for every channel asked after."""
        key = (vessel, since, op)
        if self._window is not None and self._window[0] == key:
            return self._window[1]

        def read() -> list[tuple[float, int, float]]:
            vessel_id = self._names.vessel_id(self._conn, vessel)
            if vessel_id is None:
                return []
            out = []
            later = (lambda t: t > since) if op == ">" else (lambda t: t >= since)
            for pack_id, n, data in self._conn.execute(
                f"SELECT id, n, data FROM sample_packs WHERE vessel = ? AND t_last {op} ? "
                "ORDER BY id",
                (vessel_id, since),
            ):
                pack = _decoded(self.path, pack_id, n, data)
                rows = zip(pack.times, pack.series, pack.values, strict=True)
                out += rows if later(min(pack.times)) else [r for r in rows if later(r[0])]
            return out

        rows = self._packed(read)
        self._window = (key, rows)  # type: ignore[assignment]
        return rows  # type: ignore[return-value]

    def estimates(
        self,
        vessel: str,
        since: float,
        *,
        newer_only: bool = False,
        max_rows: int | None = None,
        keys: Sequence[str] = _THIN_ESTIMATE,
    ) -> dict[str, list[object]]:
        """Return the vessel's estimates from ``since`` (Unix s) on, in time order, by column.

        ``keys`` are which of the flat form's stored columns to read (``t``, ``vessel``,
        ``phase`` and :data:`~monitor.records.schema.ESTIMATE_COLUMNS`; all by default; ``t`` is
        always read): the answer has each with one value per estimate. No ``detail``, so
        no flags. Columns, not a dict per estimate, because a chart draws columns and a
        dict per row cost the board's first draw 7 ms in 47. With ``newer_only`` only
        those after ``since``. With ``max_rows`` every n-th and the newest are kept, at
        most about ``max_rows``: their ids are taken from the ``(vessel, t)`` index
        before any row is read, then just those rows. Raises ValueError for a key that
        is not a stored column.
        """
        unknown = sorted(set(keys) - set(_THIN_ESTIMATE))
        if unknown:
            raise ValueError(f"estimates have no stored columns {unknown}")
        names = ("t", *(k for k in keys if k != "t"))
        op = ">" if newer_only else ">="
        columns = ", ".join(names)
        if max_rows is None:
            rows = self._all(
                f"SELECT {columns} FROM estimates WHERE vessel = ? AND t {op} ? ORDER BY t",
                (vessel, since),
            )
        else:
            ids = [i for (i,) in self._all(
                f"SELECT id FROM estimates WHERE vessel = ? AND t {op} ? ORDER BY t",
                (vessel, since))]  # fmt: skip
            picked = ids[:: max(1, math.ceil(len(ids) / max(1, max_rows)))]
            if ids and picked[-1] != ids[-1]:
                picked.append(ids[-1])
            rows = []
            for start in range(0, len(picked), _ID_CHUNK):
                chunk = picked[start : start + _ID_CHUNK]
                rows += self._all(
                    f"SELECT {columns} FROM estimates WHERE id IN ({', '.join('?' * len(chunk))})",
                    chunk,
                )
            rows.sort(key=lambda r: r[0])
        values = list(zip(*rows, strict=True)) or [() for _ in names]
        return {name: list(column) for name, column in zip(names, values, strict=True)}

    def latest_estimate(self, vessel: str) -> dict[str, object] | None:
        """Return the vessel's newest estimate in its flat form (flags and all) with the row's
        ``id`` and ``block``, as :func:`read_estimates` gives it; None when there is none.

        One probe of the ``(vessel, t)`` index, where a ``GROUP BY`` over the table
        read every estimate (40-520 ms on a week, growing with the fleet).
        """
        columns = TABLE_COLUMNS["estimates"]
        rows = self._all(
            f"SELECT {', '.join(columns)} FROM estimates WHERE vessel = ? "
            "ORDER BY t DESC, id DESC LIMIT 1",
            (vessel,),
        )
        if not rows:
            return None
        return _flat_estimate(self.path, dict(zip(columns, rows[0], strict=True)))

    def runs(self) -> list[dict[str, object]]:
        """Return the runs in id order (times Unix s; ``summary`` parsed)."""
        sql = f"SELECT {', '.join(TABLE_COLUMNS['runs'])} FROM runs ORDER BY id"
        return list(_records(self.path, "runs", self._all(sql), ("summary",)))

    def ended_runs(self) -> list[dict[str, object]]:
        """Return the ended runs in id order: vessel, run, start_t, end_t (Unix s), steps.

        ``steps`` is taken from each summary inside SQLite, so the summaries are not
        read whole (cheap however many runs the log holds); None when it has none.
        """
        rows = self._all(
            "SELECT vessel, run, start_t, end_t, json_extract(summary, '$.steps') FROM runs "
            "WHERE end_t IS NOT NULL ORDER BY id"
        )
        keys = ("vessel", "run", "start_t", "end_t", "steps")
        return [dict(zip(keys, r, strict=True)) for r in rows]


# ---------------------------------------------------------------------------------------
# Verifying


class _Stream:
    """One table's rows in id order, with the next row held back (``head``)."""

    def __init__(self, conn: sqlite3.Connection, table: str, layout: Layout) -> None:
        self.table = table
        columns = ", ".join(layout.table_columns[table])
        self._rows = iter(conn.execute(f"SELECT {columns} FROM {table} ORDER BY id"))
        self.head: Row | None = next(self._rows, None)

    def take(self) -> Row:
        row = self.head
        self.head = next(self._rows, None)
        return row  # type: ignore[return-value]


_MAX_PROBLEMS = 20


def _count(conn: sqlite3.Connection, table: str, what: str = "count(*)") -> int | None:
    try:
        return conn.execute(f"SELECT {what} FROM {table}").fetchone()[0]
    except sqlite3.Error:
        return None


def _verify_chain(
    conn: sqlite3.Connection, layout: Layout
) -> tuple[list[tuple[int, str]], str | None]:
    """Return (problems as (block, sentence), the last block's hash)."""
    problems: list[tuple[int, str]] = []
    streams = [_Stream(conn, name, layout) for name in layout.hashed_tables]
    blocks = conn.execute(
        "SELECT block, committed_t, rows, prev_hash, hash FROM blocks ORDER BY block"
    )
    expected, prev_stored = 1, GENESIS_HASH
    seen: set[object] = set()
    head: str | None = None
    for block, committed_t, rows, prev_hash, stored in blocks:
        seen.add(block)
        prev_hash = prev_hash.decode("ascii", "replace")
        head = stored = stored.decode("ascii", "replace")
        if block != expected:
            problems.append((expected, f"block {expected} is missing (next is {block})"))
        if prev_hash != prev_stored:
            problems.append((block, f"block {block} does not chain to the block before it"))
        tables: dict[str, list[Row]] = {}
        for stream in streams:
            while stream.head is not None and stream.head[1] < block:
                row = stream.take()
                problems.append(
                    (row[1], f"{stream.table} id {row[0]} of block {row[1]} is out of order")
                )
            taken = tables[stream.table] = []
            while stream.head is not None and stream.head[1] == block:
                taken.append(stream.take())
        total = sum(len(t) for t in tables.values())
        if total != rows:
            problems.append((block, f"block {block} has {total} rows where it recorded {rows}"))
        try:
            digest = block_hash(block, committed_t, rows, prev_hash, tables, layout)
        except (ValueError, TypeError, struct.error) as exc:
            problems.append((block, f"block {block} cannot be hashed ({exc})"))
        else:
            if digest != stored:
                problems.append((block, f"block {block}: its rows do not match its hash"))
        prev_stored, expected = stored, block + 1
    for stream in streams:
        while stream.head is not None:
            row = stream.take()
            if row[1] in seen:
                problems.append(
                    (row[1], f"{stream.table} id {row[0]} of block {row[1]} is out of order")
                )
            else:
                problems.append(
                    (row[1], f"{stream.table} id {row[0]} names block {row[1]}, which is not there")
                )
    return problems, head


def head_path(log: str | os.PathLike[str]) -> Path:
    """Return where a log's chain head is kept: ``<log>.head`` beside it."""
    log = Path(log)
    return log.with_name(log.name + ".head")


def _head_signature(key: bytes, block: int, digest: str) -> str:
    return hmac.new(key, f"ebullio-head:{block}:{digest}".encode(), hashlib.sha256).hexdigest()


def head_record(
    block: int, digest: str, committed_t: float, key: bytes | None
) -> dict[str, object]:
    """Return the head file's JSON object: block, hash, commit time, and ``hmac`` with a key."""
    head: dict[str, object] = {"block": block, "hash": digest, "committed_t": committed_t}
    if key:
        head["hmac"] = _head_signature(key, block, digest)
    return head


def _check_head(
    conn: sqlite3.Connection, head: Mapping[str, object], key: bytes | None, where: str
) -> str | None:
    """Return why the log does not reach ``head`` (or its signature fails), None if it does."""
    block, digest = head.get("block"), head.get("hash")
    if type(block) is not int or not isinstance(digest, str):
        return f"{where} is not a chain head (it needs an integer 'block' and a 'hash')"
    if key:
        signature = head.get("hmac")
        if not isinstance(signature, str) or not hmac.compare_digest(
            signature, _head_signature(key, block, digest)
        ):
            return f"{where} does not carry a valid signature for this key: it was altered"
    row = conn.execute("SELECT hash FROM blocks WHERE block = ?", (block,)).fetchone()
    if row is None:
        last = conn.execute("SELECT max(block) FROM blocks").fetchone()[0] or 0
        return (f"the log ends at block {last} but {where} records block {block}: "
                f"blocks {last + 1} to {block} were removed")  # fmt: skip
    stored = row[0].decode("ascii", "replace") if isinstance(row[0], bytes) else row[0]
    if stored != digest:
        return f"block {block} does not have the hash {where} records: it was rewritten"
    return None


def verify(
    path: str | os.PathLike[str],
    head: Mapping[str, object] | None = None,
    key: bytes | None = None,
) -> dict[str, object]:
    """Return the result of checking a log's hash chain; never raises for a bad file.

    Keys: ``ok``; ``samples``, ``quarantined`` and ``blocks`` (row counts, None when
    they cannot be read); ``first_bad_block`` (the lowest block with a problem, or
    None); ``reason`` (the first problem in a sentence, None when ok); ``problems``
    (up to 20 sentences, lowest block first); ``head_hash`` (the last block's hash,
    to keep elsewhere against a rewritten last block); ``state``: ``intact``,
    ``tampered`` (the chain or the head disagrees with the rows), ``damaged`` (SQLite's
    own ``quick_check`` finds the file corrupt: a disk or copy fault, not an edit of
    rows) or ``not_a_log`` (missing, not SQLite, not a recorder log); ``head_checked``:
    where the head that was checked came from (``given``, the ``<log>.head`` file, or
    None: without one, removed trailing blocks cannot be seen). ``head`` is a head to
    check against (a JSON object as :func:`head_record` makes, kept elsewhere or read
    from the broker); else the ``.head`` file beside the log is used when present.
    With ``key`` the head's signature must hold. The file is opened read-only.
    """
    result: dict[str, object] = {
        "ok": False, "state": "not_a_log", "samples": None, "quarantined": None,
        "blocks": None, "first_bad_block": None, "reason": None, "problems": [],
        "head_hash": None, "head_checked": None,
    }  # fmt: skip
    try:
        conn, layout = _open_log(path)
    except LogFormatError as exc:
        result["reason"] = str(exc)
        result["problems"] = [str(exc)]
        return result
    where = "the given head"
    if head is None:
        side = head_path(path)
        if side.exists():
            where = f"the head file {side.name}"
            try:
                head = json.loads(side.read_text(encoding="utf-8"))
            except (OSError, ValueError) as exc:
                head = {"unreadable": str(exc)}
            if not isinstance(head, Mapping):
                head = {}
    try:
        damage = [r[0] for r in conn.execute("PRAGMA quick_check").fetchall()]
    except sqlite3.Error as exc:
        damage = [str(exc)]
    if damage != ["ok"]:
        result["state"] = "damaged"
        found = "; ".join(map(str, damage[:3]))
        result["reason"] = (f"{path}: SQLite finds the file damaged ({found}); "
                            "a disk or copy fault, not an edit of its rows")  # fmt: skip
        result["problems"] = [result["reason"]]
        conn.close()
        return result
    try:
        conn.text_factory = bytes  # hash text as its stored bytes; bad UTF-8 cannot raise
        if layout.version == 1:
            result["samples"] = _count(conn, "samples")
        else:
            result["samples"] = _count(conn, "sample_packs", "coalesce(sum(n), 0)")
        result["quarantined"] = _count(conn, "quarantine")
        result["blocks"] = _count(conn, "blocks")
        problems, head_hash = _verify_chain(conn, layout)
        if head is not None:
            result["head_checked"] = "given" if where == "the given head" else head_path(path).name
            cut = _check_head(conn, head, key, where)
            if cut is not None:
                problems.append((math.inf, cut))  # type: ignore[arg-type]
    except sqlite3.Error as exc:
        LOG.warning("verify %s: SQLite reports %s", path, exc)
        result["state"] = "damaged"
        result["reason"] = f"{path}: SQLite cannot read the log ({exc})"
        result["problems"] = [result["reason"]]
        return result
    except (AttributeError, TypeError, ValueError) as exc:  # a row of the wrong shape
        result["state"] = "tampered"
        result["reason"] = f"{path}: a row does not have the recorder's layout ({exc})"
        result["problems"] = [result["reason"]]
        return result
    finally:
        conn.close()
    result["head_hash"] = head_hash
    if problems:
        problems.sort(key=lambda p: p[0])
        first = problems[0][0]
        result["state"] = "tampered"
        result["first_bad_block"] = first if math.isfinite(first) else None
        result["reason"] = problems[0][1]
        result["problems"] = [p[1] for p in problems[:_MAX_PROBLEMS]]
    else:
        result["ok"] = True
        result["state"] = "intact"
    return result

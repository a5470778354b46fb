"""Altering a recorder log as someone editing its rows would: for tests of the hash chain."""

from __future__ import annotations

import math
import sqlite3
from collections.abc import Callable
from pathlib import Path

from monitor.records.packs import decode_pack, encode_pack
from monitor.records.recorder import schema_version


def edit_pack(path: str | Path, pack_id: int, change: Callable[[list[list]], None]) -> int:
    """Unpack one pack of a schema-2 log, let ``change`` alter its columns (positions,
    times, series, qualities, values: lists it may edit in place), and pack it back with
    its ``n`` and ``t_last`` to match, as a careful forger would; return its block."""
    conn = sqlite3.connect(path, isolation_level=None)
    try:
        block, n, data = conn.execute(
            "SELECT block, n, data FROM sample_packs WHERE id = ?", (pack_id,)
        ).fetchone()
        pack = decode_pack(data, n)
        columns = [list(pack.positions), list(pack.times), list(pack.series),
                   list(pack.qualities), list(pack.values)]  # fmt: skip
        change(columns)
        conn.execute(
            "UPDATE sample_packs SET n = ?, t_last = ?, data = ? WHERE id = ?",
            (len(columns[0]), max(columns[1]), encode_pack(*columns), pack_id),
        )
    finally:
        conn.close()
    return block


def change_one_reading(path: str | Path, which: int = 50, by: float = 5.0) -> None:
    """Add ``by`` to the value of the ``which``-th recorded reading (from 1), whatever the
    log's layout: a row of ``samples`` (schema 1), or a value inside its pack, packed
    again (schema 2)."""
    if schema_version(path) == 1:
        conn = sqlite3.connect(path, isolation_level=None)
        conn.execute("UPDATE samples SET value = value + ? WHERE id = ?", (by, which))
        conn.close()
        return
    conn = sqlite3.connect(path)
    packs = conn.execute("SELECT id, n FROM sample_packs ORDER BY id").fetchall()
    conn.close()
    seen, k = 0, 0
    while k < len(packs) and seen + packs[k][1] < which:
        seen += packs[k][1]
        k += 1
    if k == len(packs):
        raise ValueError(f"{path} holds fewer than {which} readings")
    pack_id, at = packs[k][0], which - seen - 1

    def add(columns: list[list]) -> None:
        value = columns[4][at]
        columns[4][at] = (0.0 if math.isnan(value) else value) + by

    edit_pack(path, pack_id, add)

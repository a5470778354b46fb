"""Altering a recorder log as someone editing its rows would: for tests of the hash chain."""

from __future__ import annotations

import math
import sqlite3
from pathlib import Path

from monitor.records.packs import decode_pack, encode_pack
from monitor.records.recorder import schema_version


def change_one_reading(path: str | Path, which: int = 50, by: float = 5.0) -> None:
    """Add ``by`` to the value of the ``which``-th recorded reading (from 1), whatever the
    log's layout: a row of ``samples`` (schema 1), or a value inside its pack, packed
    again (schema 2)."""
    conn = sqlite3.connect(path, isolation_level=None)
    try:
        if schema_version(path) == 1:
            conn.execute("UPDATE samples SET value = value + ? WHERE id = ?", (by, which))
            return
        seen = 0
        for pack_id, n, data in conn.execute(
            "SELECT id, n, data FROM sample_packs ORDER BY id"
        ).fetchall():
            if seen + n < which:
                seen += n
                continue
            pack = decode_pack(data, n)
            values = list(pack.values)
            at = which - seen - 1
            values[at] = (0.0 if math.isnan(values[at]) else values[at]) + by
            changed = encode_pack(pack.positions, pack.times, pack.series, pack.qualities, values)
            conn.execute("UPDATE sample_packs SET data = ? WHERE id = ?", (changed, pack_id))
            return
        raise ValueError(f"{path} holds fewer than {which} readings")
    finally:
        conn.close()

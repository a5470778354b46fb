"""Reading a table of the rig configuration (TOML), with errors that name file, key and reason.

:class:`ConfigTable` is what ``monitor/rig/config.py`` reads the whole file with, and what a
driver's ``read_table`` (see :mod:`drivers.registry`) reads its ``[[instruments]]``
table with, so every driver's options are checked and reported the same way. It lives
in ``drivers/`` because ``drivers/`` may import nothing from ``monitor/``.
"""

from __future__ import annotations

import math
from typing import Any

from drivers.errors import ConfigError


class ConfigTable:
    """A TOML table being read: knows its file, its dotted path and which keys were used.

    ``data`` is the parsed table, ``path`` its place in the file (``instruments[1]``,
    empty for the top) and ``file`` the file's name. The typed getters raise
    :class:`ConfigError` naming the file, the key and the reason; :meth:`done` refuses
    the keys nobody read.
    """

    def __init__(self, data: object, path: str, file: str) -> None:
        if not isinstance(data, dict):
            raise ConfigError(f"{file}: {path or 'the file'}: expected a table")
        self.data: dict[str, Any] = data
        self.path = path
        self.file = file
        self.used: set[str] = set()

    def where(self, key: str) -> str:
        """Return the dotted path of ``key`` in this table (``instruments[1].poll_s``)."""
        return f"{self.path}.{key}" if self.path else key

    def fail(self, key: str, reason: str) -> ConfigError:
        """Return the error for ``key``: ``<file>: <path>.<key>: <reason>``."""
        return ConfigError(f"{self.file}: {self.where(key)}: {reason}")

    def fail_here(self, reason: str) -> ConfigError:
        """Return the error for the table as a whole: ``<file>: <path>: <reason>``."""
        return ConfigError(f"{self.file}: {self.path or 'the file'}: {reason}")

    def has(self, key: str) -> bool:
        """Return whether the table gives ``key`` (without marking it read)."""
        return key in self.data

    def get(self, key: str, default: Any = None) -> Any:
        """Return ``key``'s value as it is, or ``default``; the key counts as read."""
        self.used.add(key)
        return self.data.get(key, default)

    def string(self, key: str, default: str | None = None, *, required: bool = False) -> Any:
        """Return ``key`` as a non-empty string, ``default`` (None) when absent."""
        value = self.get(key, default)
        if value is None:
            if required:
                raise self.fail(key, "is required")
            return None
        if not isinstance(value, str) or not value.strip():
            raise self.fail(key, f"must be a non-empty string, not {value!r}")
        return value

    def number(
        self,
        key: str,
        default: float | None = None,
        *,
        required: bool = False,
        lo: float | None = None,
        hi: float | None = None,
        positive: bool = False,
    ) -> Any:
        """Return ``key`` as a finite float within the bounds, ``default`` when absent."""
        value = self.get(key, default)
        if value is None:
            if required:
                raise self.fail(key, "is required")
            return None
        if isinstance(value, bool) or not isinstance(value, int | float):
            raise self.fail(key, f"must be a number, not {value!r}")
        value = float(value)
        if not math.isfinite(value):
            raise self.fail(key, "must be finite")
        if positive and value <= 0.0:
            raise self.fail(key, f"must be above zero, not {value:g}")
        if (lo is not None and value < lo) or (hi is not None and value > hi):
            raise self.fail(key, f"{value:g} is outside {lo:g} to {hi:g}")
        return value

    def boolean(self, key: str, default: bool) -> bool:
        """Return ``key`` as true or false, ``default`` when absent."""
        value = self.get(key, default)
        if not isinstance(value, bool):
            raise self.fail(key, f"must be true or false, not {value!r}")
        return value

    def tables(self, key: str) -> list[ConfigTable]:
        """Return the tables of the array of tables ``key`` (none when absent)."""
        value = self.get(key, [])
        if not isinstance(value, list):
            raise self.fail(key, "must be a list of tables")
        return [
            ConfigTable(item, f"{self.where(key)}[{i}]", self.file) for i, item in enumerate(value)
        ]

    def table(self, key: str) -> ConfigTable | None:
        """Return the table ``key``, or None when absent."""
        if key not in self.data:
            return None
        return ConfigTable(self.get(key), self.where(key), self.file)

    def done(self) -> None:
        """Raise for keys that were never read (misspelt or unknown)."""
        unknown = sorted(set(self.data) - self.used)
        if unknown:
            known = ", ".join(sorted(self.used)) or "none"
            raise self.fail(unknown[0], f"unknown key (keys read here: {known})")

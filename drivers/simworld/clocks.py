"""Where simulated time meets real time: the clocks a simulated run is paced by.

A :class:`FastClock` runs as fast as the CPU allows and keeps the scenario's fixed
start, so logs repeat; a :class:`PacedClock` runs at a multiple of real time from now
and stamps samples with the wall clock (the demo's).
"""

from __future__ import annotations

import asyncio
import time
from typing import Protocol

from drivers.errors import ConfigError


class Clock(Protocol):
    """Where simulated time meets real time."""

    def start_epoch_s(self) -> float | None:
        """Return the epoch at which the run starts, or None to keep the scenario's."""

    async def wait_until(self, elapsed_s: float) -> None:
        """Return once ``elapsed_s`` seconds of the run have passed on this clock."""


class FastClock:
    """Runs as fast as the CPU allows; keeps the scenario's fixed start time."""

    def start_epoch_s(self) -> float | None:
        """Return None: keep the scenario's start time."""
        return None

    async def wait_until(self, elapsed_s: float) -> None:
        """Return at once, after letting other tasks run."""
        del elapsed_s
        await asyncio.sleep(0)


class PacedClock:
    """Runs at ``speed`` times real time from now, stamping samples with the wall clock."""

    def __init__(self, speed: float = 1.0) -> None:
        if not speed > 0.0:
            raise ConfigError(f"clock speed must be > 0, got {speed}")
        self.speed = speed
        self._t0_mono = time.monotonic()
        self._t0_wall = time.time()

    def start_epoch_s(self) -> float | None:
        """Return the wall-clock time at which the clock was made, s since the epoch."""
        return self._t0_wall

    async def wait_until(self, elapsed_s: float) -> None:
        """Sleep until ``elapsed_s`` simulated seconds have passed at this speed."""
        delay = self._t0_mono + elapsed_s / self.speed - time.monotonic()
        await asyncio.sleep(max(delay, 0.0))

    def slip(self, elapsed_s: float) -> float:
        """Move the clock's start on by however late it is for ``elapsed_s``; return that (s).

        Called after :meth:`wait_until`, a stalled run then goes on at pace from where
        it stalled, instead of catching up in a burst of back-to-back instants.
        """
        late_s = time.monotonic() - (self._t0_mono + elapsed_s / self.speed)
        if late_s > 0.0:
            self._t0_mono += late_s
            return late_s
        return 0.0

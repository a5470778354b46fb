"""What the filter keeps watching beside its state: each thermocouple's reading noise
(:class:`NoiseTracker`), the element's own path to the room while cooling
(:class:`ElementPath`) and a sensor's missing, stuck or implausible readings
(:class:`SensorWatch`)."""

from __future__ import annotations

import math
from collections import deque
from dataclasses import dataclass, field

import numpy as np

from monitor.estimation.contracts import Estimated
from monitor.estimation.settings import EstimatorSettings


@dataclass
class NoiseTracker:
    """A running robust estimate of one thermocouple's reading noise sd (K), from idle.

    Each idle reading z₂ with the two before it (z₀, z₁ at times t₀ < t₁ < t₂) gives
    the second difference

        d = (z₂ - z₁) - a (z₁ - z₀),   a = (t₂ - t₁) / (t₁ - t₀)

    which cancels any straight-line drift (an idle vessel cools by a few mK per
    second, and over three readings its curvature is far below the noise). For white
    reading noise of sd σ, d has sd σ·√(1 + (1 + a)² + a²) (σ√6 at even spacing); the
    normalised differences u = d / √(1 + (1 + a)² + a²) of the last ``noise_window``
    idle readings give σ in two passes: a first scale from the median absolute
    deviation, 1.4826·MAD(u) (a normal's sd, common practice, no source), then
    σ̂ = the root mean square of the u within 5 of those scales of their median. The
    first pass sets the rare spike aside (one spike spoils three differences); the
    second is nearly as precise as a plain RMS, which the MAD alone is not, and
    cutting at 5 σ lowers a normal's variance by under 0.01 %. On 12 seeded idle
    runs of 900 s (tests/monitor/test_estimator.py's noisy kettle) it came within
    0.92-1.10 of the simulated noise. Limits: the thermocouple's lag smooths the
    temperature, not noise added after it (the electronics'), which is what this
    measures; noise entering before the lag, or slow wander, is mostly cancelled and
    so under-read. Quantisation adds its Δ²/12 to what is measured, as it does to what
    the filter sees; with noise far below one step most differences are zero and σ̂
    comes out low, which the setting then floors (the filter uses max(setting, σ̂)).
    """

    #: new differences between two estimates (about 140 µs each over 600 values, so
    #: recomputing once a minute at 1 Hz costs a few µs a reading)
    REFRESH_EVERY = 60

    window: deque[float] = field(default_factory=deque)
    previous: list[tuple[float, float]] = field(default_factory=list)  # (t_s, z_c)
    new_since_estimate: int = 0
    sd_c: float | None = None  # None until noise_min_count differences are in

    def add(self, t_s: float, value_c: float, s: EstimatorSettings) -> None:
        """Take one idle reading (°C at t_s); refresh the estimate now and then."""
        prev = self.previous
        if prev and t_s - prev[-1][0] > s.noise_max_gap_s:
            prev.clear()
        prev.append((t_s, value_c))
        if len(prev) < 3:
            return
        (t0, z0), (t1, z1), (t2, z2) = prev[-3:]
        del prev[0]
        if not t2 > t1 > t0:  # time must move forward for a difference; start afresh
            prev[:] = [(t_s, value_c)]
            return
        a = (t2 - t1) / (t1 - t0)
        self.window.append(((z2 - z1) - a * (z1 - z0)) / math.sqrt(1.0 + (1.0 + a) ** 2 + a * a))
        while len(self.window) > s.noise_window:
            self.window.popleft()
        self.new_since_estimate += 1
        if len(self.window) >= s.noise_min_count and (
            self.sd_c is None or self.new_since_estimate >= self.REFRESH_EVERY
        ):
            d = np.fromiter(self.window, dtype=float, count=len(self.window))
            d -= _median(d)
            mad_sd_c = 1.4826 * _median(np.abs(d))
            kept = d[np.abs(d) <= 5.0 * mad_sd_c]
            self.sd_c = math.sqrt(float(np.mean(kept * kept))) if mad_sd_c > 0.0 else 0.0
            self.new_since_estimate = 0

    def break_chain(self) -> None:
        """Forget the last readings: the next difference starts afresh (not idle now)."""
        self.previous.clear()


def _median(values: np.ndarray) -> float:
    """Return the median of a non-empty 1-D array of finite floats: ``np.median``'s value
    (the mean of the two middle values for an even count), without its general
    machinery, which cost more than the partition itself here."""
    half = values.size // 2
    if values.size % 2:
        return float(np.partition(values, half)[half])
    part = np.partition(values, (half - 1, half))
    return float((part[half - 1] + part[half]) / 2.0)


#: Water within this of the room (K) is at rest, not cooling (common practice, no source).
REST_EXCESS_K = 3.0


@dataclass
class GapMoments:
    """Running sums of the water-minus-element reading gap (K) and the water's excess
    on the room (K) over a group of instants."""

    n: int = 0
    gap_sum_c: float = 0.0
    gap_sq_c2: float = 0.0
    excess_sum_k: float = 0.0

    def add(self, gap_c: float, excess_k: float) -> None:
        self.n += 1
        self.gap_sum_c += gap_c
        self.gap_sq_c2 += gap_c * gap_c
        self.excess_sum_k += excess_k

    @property
    def mean_gap_c(self) -> float:
        return self.gap_sum_c / self.n

    @property
    def mean_excess_k(self) -> float:
        return self.excess_sum_k / self.n

    def mean_var_c2(self, floor_c2: float) -> float:
        """Return the variance of the mean gap: the gaps' variance (at least
        ``floor_c2``, the two readings' noise) over half the instants (the lags make
        neighbours a little alike)."""
        mean = self.mean_gap_c
        return max(self.gap_sq_c2 / self.n - mean * mean, floor_c2) / (0.5 * self.n)


@dataclass
class ElementPath:
    """The element's own path to the room, learnt from the readings while cooling.

    The filter's two-node model joins the element to the water only, so its UA is
    the water's path to the room alone. A plate or a sheathed element also loses
    heat straight to the room: off and settled, it sits a little below the water and
    draws G·(T_w − T_e) from it, heat the water loses all the same. What a user means
    by the vessel's UA counts that path too (bench_worlds, 2026-12-05: the kettles
    with an element thermocouple read UA 12 % low after 10 min of cooling without
    it, p90 19 %).

    The share ρ = (T_w − T_e)/(T_w − T_a) is close to constant while a vessel cools
    (both differences fall together), so it is averaged over the cooling from
    ``element_path_settle_s`` after the switch-off, from the readings (the filter's
    element state is pulled towards the water by the model that lacks the path):
      ΔT = (R_w − R_e) + δ + (τ_w − τ_e)·r
    with δ the element thermocouple's reading above the water's at rest (idle, near
    room temperature, both in the same water), τ the sensor lags and r the water's
    mean rate over the window (a lagged sensor reads T − τ·dT/dt on a slope). UA
    reported = UA + G·ρ.
    """

    rest: GapMoments = field(default_factory=GapMoments)
    cool: GapMoments = field(default_factory=GapMoments)
    first: tuple[float, float] | None = None  # (t_s, water reading) at the window's start
    last: tuple[float, float] | None = None

    def at_rest(self, water_c: float, element_c: float, ambient_c: float) -> None:
        """Take one settled, unheated instant's readings (°C) before heating or near the room."""
        self.rest.add(water_c - element_c, water_c - ambient_c)

    def cooling(self, t_s: float, water_c: float, element_c: float, ambient_c: float) -> None:
        """Take one settled cooling instant's readings (°C)."""
        self.cool.add(water_c - element_c, water_c - ambient_c)
        if self.first is None:
            self.first = (t_s, water_c)
        self.last = (t_s, water_c)

    def rest_zero_c(self, s: EstimatorSettings) -> float | None:
        """Return the element's mean reading above the water's at rest (K), or None.

        None with fewer than ``element_path_min_readings`` rest readings, a rest more
        than ``element_zero_max_excess_k`` from the room (the path's own share would
        be in it) or a mismatch over ``element_zero_max_c``.
        """
        rest = self.rest
        if rest.n < s.element_path_min_readings:
            return None
        if abs(rest.mean_excess_k) > s.element_zero_max_excess_k:
            return None
        zero = -rest.mean_gap_c
        return zero if abs(zero) <= s.element_zero_max_c else None

    def restart(self) -> None:
        """Forget the cooling window (heating began again); the rest is kept."""
        self.cool = GapMoments()
        self.first = self.last = None

    def share(
        self, lag_diff_s: float, lag_diff_sd_s: float, s: EstimatorSettings
    ) -> Estimated | None:
        """Return ρ and its 1σ, or None before ``element_path_min_readings`` readings.

        ``lag_diff_s`` is τ_w − τ_e (s) with its 1σ. The 1σ adds: the rest's mean gap
        (or ``element_mismatch_sd_c`` with fewer than ``element_rest_min_readings``
        rest readings), the cooling's mean gap, the lag difference times the rate, and
        ``element_path_model_rel_sd`` of ρ for what the correction leaves out (the
        plate's own heat, which lags as the whole vessel cools).
        """
        cool, rest = self.cool, self.rest
        if cool.n < s.element_path_min_readings:
            return None
        pair_var = s.water_noise_sd_c**2 + s.element_noise_sd_c**2
        if rest.n >= s.element_rest_min_readings:
            # the gap at rest holds the thermocouples' mismatch (and the small share
            # of the path at the rest's own excess): ρ is the slope between the two
            rest_gap, rest_excess = rest.mean_gap_c, rest.mean_excess_k
            rest_var = rest.mean_var_c2(pair_var) + s.element_rest_floor_sd_c**2
        else:
            rest_gap, rest_var, rest_excess = 0.0, s.element_mismatch_sd_c**2, 0.0
        span = cool.mean_excess_k - rest_excess
        if not span > s.element_path_min_span_k:
            return None
        (t0, w0), (t1, w1) = self.first, self.last
        rate = (w1 - w0) / (t1 - t0) if t1 > t0 else 0.0
        rho = (cool.mean_gap_c + lag_diff_s * rate - rest_gap) / span
        var_rise = rest_var + cool.mean_var_c2(pair_var) + (lag_diff_sd_s * rate) ** 2
        sd = math.sqrt(var_rise / (span * span) + (s.element_path_model_rel_sd * rho) ** 2)
        return Estimated(rho, sd)


@dataclass
class SensorWatch:
    """Per-sensor health bookkeeping (owned by one estimator)."""

    last_value: float | None = None
    same_since_s: float | None = None
    model_at_same: float | None = None
    # readings in a row more than huber_k innovation sd's out (down-weighted or set
    # aside), and the smallest of their innovations, K
    missed_in_row: int = 0
    smallest_miss_c: float = math.inf
    noise: NoiseTracker = field(default_factory=NoiseTracker)

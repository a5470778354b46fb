"""The live estimator: one extended Kalman filter per vessel over states and parameters.

State vector (a layout per vessel, see :class:`Layout`)::

    T_w      water temperature, °C
    T_e      element (or plate) temperature, °C       only with an element thermocouple
    y        the water thermocouple's own reading, °C  only when its lag τ > 0 is modelled
    ln UA    loss conductance to the room, ln(W/K)
    ln C     heat capacity of the water node, ln(J/K)
    ln G     element-to-water conductance, ln(W/K)    only with an element thermocouple

The parameters are random walks in their logarithms, so they stay positive and
drift by a set *fraction* per √s (:class:`EstimatorSettings`). Power is an input,
not a state: each step uses the mean power over the interval (from the energy
counter when there is one, which makes thermostat cycling exact). Each step is the
model's exact discretisation (:mod:`monitor.physics.transition`), the water clamped at the
site's boiling point with the surplus evaporating water at the latent heat.

Why an EKF, not a UKF
    The temperature dynamics are linear for given parameters and the transition is
    available in closed form, so the EKF's linearisation is exact in the temperatures
    and only first-order in the slowly moving log-parameters; the Jacobian costs
    three extra closed-form steps. A UKF would need 2n+1 = 13 steps per update for
    the same model and could not meet the throughput target (20 000 steps/s) on
    one core. The forecast, which is strongly non-linear in the parameters, does
    use sigma points (:func:`forecast_time_to_target`).

Where the parameters come from in a heat-up
    During the first heat-up of a run the parameters are not the filter's own: every
    ~10 s (then every 5 % of the heating so far) :mod:`monitor.estimation.batchfit` fits the
    two-node model with the element's heat capacity and both sensor lags as
    parameters, over the run from just before switch-on to now, and the filter is
    re-anchored on the fit (its parameters, lags, temperatures and the fit's whole
    covariance). UA, C, the water mass, G and the time to target are the fit's until
    the target is reached; between fits the fitted model carries the temperatures on
    for the countdown. Idle, holding, cooling and standby stay with the filter,
    starting from the last fit. ``EstimatorSettings.batch_fit = False`` turns it off.
    Without an element thermocouple the fit keeps the element as a hidden node.

Without an element thermocouple (outside the heat-up fit)
    The element is not a hidden node of the filter: the water temperature alone pins G only
    through the few seconds after each switching, so a hidden element node would
    add a poorly observed state that wanders. The one-node model lumps the element's
    heat capacity into C and reports no element conductance.

Thermocouple lag
    The water sensor's first-order lag (τ, from the log's ``water_sensor_tau_s`` or
    the settings) is a state of its own; the filter compares readings with ``y``, not
    with T_w, so a 4 s sensor no longer makes the last minute of a heat-up look slow.
    The element thermocouple's lag (``element_sensor_tau_s``) is modelled the same
    way when it is given; without it the 1-2 s lag of a plate sensor throws large
    innovations at every switching, since the plate moves ~10 K/s then.

Robustness (:meth:`VesselEstimator._update`)
    No reading is gated and no state is reset. A reading whose innovation is more than
    ``huber_k`` (2.5) of its own standard deviations out is down-weighted (Huber): its
    variance is raised so the update has weight k/|ν/√S|, as if the innovation had been
    clipped at k√S. Only gross errors beyond ``gross_error_sd`` (30 σ: the 8 K spikes of
    a noisy thermocouple) are set aside. Readings beyond the 99.9 % point (χ²₁, 10.83)
    are flagged to the operator either way. Whatever the weight, one reading may move
    ln UA, ln C or ln G by at most ``max_param_step`` (0.03); a larger step is scaled
    down by raising the reading's variance again, so the covariance follows the gain
    actually used. After ``reacquire_after`` (5) such readings in a row the model has
    lost that sensor's temperature: variance is added to its temperature states (fully
    correlated, so the water and its lagged sensor move together), never a reset, and
    ordinary updates bring it back. The reading noise used is the larger of the setting
    and a robust estimate from idle readings
    (:class:`monitor.estimation.sensors.NoiseTracker`). C is learnt only while the element
    heats: with no heating power over the step (and on the boil) ln C
    has no random walk and zero gain (a consider update). A reading outside the
    plausible range, or one that stays exactly the same while the model moves by more
    than a kelvin, turns that sensor to predict-only with a flag. Gaps are predicted
    across in one exact step with the process noise growing with the gap.

The filter core is written out in numpy (:class:`monitor.estimation.cores.FastCore`)
and checked step by step against filterpy's ``ExtendedKalmanFilter``
(:class:`monitor.estimation.cores.FilterpyCore`), to 1e-9, in the tests.
"""

from __future__ import annotations

import dataclasses
import logging
import math
import time
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from drivers.sample import ANY_FINITE, ReadingLimits
from monitor.estimation import batchfit
from monitor.estimation.contracts import (
    Estimate,
    Estimated,
    Flag,
    Level,
    Phase,
    TargetForecast,
)
from monitor.estimation.cores import FastCore, FilterpyCore, Layout
from monitor.estimation.sensors import REST_EXCESS_K, ElementPath, SensorWatch
from monitor.estimation.settings import EstimatorSettings, VesselConfig
from monitor.physics import kernels, transition, water

_log = logging.getLogger("ebullio.estimator")


def _a(word: str) -> str:
    """Return the indefinite article for ``word`` ("an element", "a water")."""
    return "an" if word[:1].lower() in "aeiou" else "a"


#: Channels whose missing readings the filter watches (a NaN is passed on for them).
_WATCHED = frozenset(("water", "element"))

#: Two-sided normal quantile for a 90 % interval (scipy.stats.norm.ppf(0.95)).
Z_90 = 1.6448536269514722
#: 1σ, as a fraction, of every parameter between switch-on and the heat-up's first
#: batch fit (a few seconds): a 0.8 kg kettle read 1.24 kg with a 3 % std there.
UNFITTED_RELATIVE_SD = 0.3
#: The filter is re-anchored only on fits whose early factor (monitor.estimation.batchfit) is at
#: most this, i.e. that have seen a rise of at least 10 K.
ANCHOR_EARLY_FACTOR = 1.5


@dataclass
class RunTotals:
    """What one estimator has accumulated, for run summaries."""

    energy_j: float = 0.0
    heating_started_s: float | None = None
    heat_up_done_s: float | None = None
    heat_up_start_c: float | None = None
    heat_up_start_energy_j: float = 0.0
    heat_up_energy_j: float | None = None
    evaporated_kg: float = 0.0
    rejected_readings: int = 0
    water_readings: int = 0  # plausible water readings offered to the filter
    downweighted_readings: int = 0  # readings given less than full weight (robust update)
    nis_sum: float = 0.0  # sum of the water readings' NIS, for the run's mean
    reached_target: bool = False
    holding_sum_c: float = 0.0
    holding_steps: int = 0
    flags_raised: dict[str, Flag] = field(default_factory=dict)


class VesselEstimator:
    """One vessel's filter. Feed it with :meth:`step` once per instant, in time order."""

    def __init__(
        self,
        config: VesselConfig,
        settings: EstimatorSettings | None = None,
        core: type[FastCore] | type[FilterpyCore] = FastCore,
        fit_budget: batchfit.FitBudget | None = None,
    ) -> None:
        self.config = config
        #: the live service's shared CPU budget for heat-up fits (None: fit when due)
        self.fit_budget = fit_budget
        self.settings = settings or EstimatorSettings()
        tau = self.settings.water_sensor_tau_s
        tau = config.water_sensor_tau_s if tau is None else tau
        tau_e = self.settings.element_sensor_tau_s
        tau_e = config.element_sensor_tau_s if tau_e is None else tau_e
        if self.settings.batch_fit:
            # the fit learns both lags, so the filter always carries the lag states
            tau = tau if tau and tau > 0.0 else self.settings.water_sensor_tau_prior_s
            tau_e = tau_e if tau_e and tau_e > 0.0 else self.settings.element_sensor_tau_prior_s
        self.lag_rate_per_s = 1.0 / tau if tau and tau > 0.0 else None
        two_node = config.has_element_sensor
        self.element_lag_rate_per_s = 1.0 / tau_e if two_node and tau_e and tau_e > 0.0 else None
        self.layout = Layout.build(
            two_node, self.lag_rate_per_s is not None, self.element_lag_rate_per_s is not None
        )
        self.element_capacity_j_per_k = (
            config.element_heat_capacity_j_per_k
            if config.element_heat_capacity_j_per_k
            else 0.03 * max(config.vessel_heat_capacity_j_per_k, 1000.0) + 100.0
        )
        self.boiling_point_c = water.boiling_point_c(config.pressure_kpa)
        self.latent_heat_j_per_kg = water.latent_heat_j_per_kg(config.pressure_kpa)
        self.target_c = config.target_c if config.target_c is not None else self.boiling_point_c
        self._core_type = core
        #: (time s, reason) of each failure inside the filter this run (see :meth:`step`)
        self.faults: list[tuple[float, str]] = []
        self._limits = ReadingLimits.from_metadata(
            {"rated_power_w": config.rated_power_w, "max_power_w": config.max_power_w}
        )
        self.core: FastCore | FilterpyCore | None = None
        self.t_s: float | None = None
        self.totals = RunTotals()
        self._watch = {"water": SensorWatch(), "element": SensorWatch()}
        self._last_power_w = 0.0
        self._previous_mean_power_w = 0.0
        self._last_switch_s: float | None = None
        self._last_energy_wh: float | None = None
        self._last_ambient_c: float | None = None
        self._boiling = False
        self._nis: float | None = None
        self._g_at_80: Estimated | None = None
        lay = self.layout
        self._temps = lay.temperatures
        self._temps_ix = np.ix_(self._temps, self._temps)
        self._param_columns = [lay.ln_ua, lay.ln_c] + ([lay.ln_g] if lay.ln_g is not None else [])
        self._temps_params_ix = np.ix_(self._temps, self._param_columns)
        self._eye = np.eye(lay.size)
        #: (reading, the state it reads) of each thermocouple, and the learnt parameters
        #: with and without ln C (_update)
        self._channels = [("water", lay.lagged if lay.lagged is not None else lay.water)]
        if lay.element is not None:
            j_e = lay.element_lagged if lay.element_lagged is not None else lay.element
            self._channels.append(("element", j_e))
        self._frozen_c = (lay.ln_c,)
        #: the states a forecast depends on (forecast_state), and their covariance block
        idx = (
            [lay.water]
            + ([lay.element] if lay.element is not None else [])
            + [lay.ln_ua, lay.ln_c]
            + ([lay.ln_g] if lay.ln_g is not None else [])
        )
        self._forecast_ix = (np.array(idx), np.ix_(idx, idx))
        self._learnt_without_c = [i for i in self._param_columns if i != lay.ln_c]
        # the learnt parameters' indices and the frozen mask as the compiled update takes
        # them, without and with the consider update of ln C
        mask_c = np.zeros(lay.size, dtype=np.bool_)
        mask_c[lay.ln_c] = True
        self._update_arrays = {
            False: (np.array(self._param_columns, dtype=np.int64), np.zeros(lay.size, np.bool_)),
            True: (np.array(self._learnt_without_c, dtype=np.int64), mask_c),
        }
        # the usual predict and update each in one compiled call (FastCore only: the
        # filterpy path is the reference it is checked against)
        self._fused = core is FastCore
        # the sensor lags' states as the compiled predicts take them (-1: not modelled)
        self._lag_ix = tuple(-1 if i is None else i for i in (lay.lagged, lay.element_lagged))
        self._q_cache: dict[tuple[float, bool], np.ndarray] = {}
        self.heat_up_fit: batchfit.HeatUpFit | None = (
            batchfit.HeatUpFit(self._fit_priors(tau, tau_e), two_node)
            if self.settings.batch_fit
            else None
        )
        self._fit_state: tuple[float, float] | None = None  # (T_e, T_w) of the fit, now
        self._fit_eta_rel_sd = 0.0  # the fit's time-to-target spread over the time itself
        self._fit_anchored_s: float | None = None
        self._element_path = ElementPath()
        self._element_zero_c: float | None = None  # set at the first switch-on (_zeroed)
        self._fit_waiting_since_s: float | None = None  # a due fit the budget put off

    # -- set-up -------------------------------------------------------------------------

    def _prior_capacity_j_per_k(self) -> float:
        volume = self.config.nominal_volume_l or 1.5
        # 70 % full at c_p 4186 J/(kg·K) (common practice, no source)
        return self._non_water_capacity() + 4186.0 * 0.7 * volume

    def _fit_priors(self, tau_s: float | None, tau_e_s: float | None) -> batchfit.FitPriors:
        """Return the batch fit's weak priors (θ order of :mod:`monitor.estimation.batchfit`)."""
        s, cfg = self.settings, self.config
        rated = cfg.rated_power_w or 2000.0
        ce = self.element_capacity_j_per_k
        water_c = self._prior_capacity_j_per_k() - self._non_water_capacity()
        # the water node holds everything but the element (and the water)
        node_c = water_c + max(cfg.vessel_heat_capacity_j_per_k - ce, 0.0)
        mean = [
            math.log(s.ua_prior_w_per_k),
            math.log(max(node_c, 100.0)),
            math.log(rated / 40.0),
            math.log(ce),
            math.log(tau_s or s.water_sensor_tau_prior_s),
            20.0,
        ]
        # 1σ: the volume may be unknown (C within a factor of e^1.5), the element
        # capacity and lags within about a factor of two, G within e. Without an
        # element thermocouple the water reading sees the element's delay C_e/G and
        # its own lag in series, and two first-order lags give the same response in
        # either order: the readings fix their sum, the split is the prior's. With
        # 0.8 there, 3 of 20 kettles of bench_worlds put τ_w at 6-12 s against a true
        # 1.1-1.6 s, two near-mirror valleys within a unit of cost, and the water 2-7 K
        # ahead of the truth (2026-12-05); so there the water lag's 1σ is e^0.5
        # (0.9-6.8 s at 95 % about 2.5 s: a sheathed thermocouple in water, judgement,
        # from memory). With an element thermocouple the readings split it themselves.
        tau_w_sd = 0.8 if self.config.has_element_sensor else 0.5
        sd = [1.0, 1.5, 1.0, 0.8, tau_w_sd, 20.0]
        if self.config.has_element_sensor:
            mean += [math.log(tau_e_s or s.element_sensor_tau_prior_s), 0.0]
            sd += [1.0, 5.0]
        return batchfit.FitPriors(np.array(mean), np.array(sd))

    def _initialise(self, t_s: float, water_c: float, element_c: float | None) -> None:
        lay, s = self.layout, self.settings
        x = np.zeros(lay.size)
        p = np.zeros((lay.size, lay.size))
        x[lay.water] = water_c
        p[lay.water, lay.water] = 0.3**2
        if lay.lagged is not None:
            x[lay.lagged] = water_c
            p[lay.lagged, lay.lagged] = s.water_noise_sd_c**2
            p[lay.water, lay.lagged] = p[lay.lagged, lay.water] = s.water_noise_sd_c**2
        if lay.element is not None:
            x[lay.element] = element_c if element_c is not None else water_c
            p[lay.element, lay.element] = 1.0
        if lay.element_lagged is not None:
            x[lay.element_lagged] = x[lay.element]
            p[lay.element_lagged, lay.element_lagged] = s.element_noise_sd_c**2
            # the sensor's state is known to its noise, the element's to 1 K about it: the
            # cross term may not pass √(1·noise²) or P is not a covariance (it was 0.5
            # against 0.3 once, and a heater's first slow update then made P_jj negative)
            p[lay.element, lay.element_lagged] = p[lay.element_lagged, lay.element] = (
                s.element_noise_sd_c**2
            )
        x[lay.ln_ua] = math.log(s.ua_prior_w_per_k)
        p[lay.ln_ua, lay.ln_ua] = s.ua_prior_ln_sd**2
        x[lay.ln_c] = math.log(self._prior_capacity_j_per_k())
        p[lay.ln_c, lay.ln_c] = s.capacity_prior_ln_sd**2
        if lay.ln_g is not None:
            rated = self.config.rated_power_w or 2000.0
            x[lay.ln_g] = math.log(rated / 40.0)  # about 40 K over the water at full power
            p[lay.ln_g, lay.ln_g] = s.conductance_prior_ln_sd**2
        self.core = self._core_type(x, p)
        self.t_s = t_s

    # -- the model ------------------------------------------------------------------------

    def _params(self, x: list[float]) -> tuple[float, float, float | None]:
        lay = self.layout
        g = math.exp(x[lay.ln_g]) if lay.ln_g is not None else None
        return math.exp(x[lay.ln_ua]), math.exp(x[lay.ln_c]), g

    def _propagate(
        self,
        x: list[float],
        dt_s: float,
        power_w: float,
        ambient_c: float,
        boiling: bool,
        sensitivities: bool = False,
    ) -> tuple[list[float], Any, Any, float]:
        """Return (f(x), M, S, heat evaporated J) for one step.

        M is the temperature block of ∂f/∂x and S the temperatures' derivatives by
        the log-parameters (when ``sensitivities``; see :mod:`monitor.physics.transition`);
        both are None when the water is clamped at the boil. Works on plain lists of
        floats: this runs at every filter step.
        """
        lay = self.layout
        ua, c, g = self._params(x)
        lagged = x[lay.lagged] if lay.lagged is not None else None
        element_lagged = x[lay.element_lagged] if lay.element_lagged is not None else None
        out = list(x)
        if boiling:
            temps, evaporated_j = transition.clamped_step(
                self.boiling_point_c,
                x[lay.element] if lay.element is not None else None,
                lagged,
                dt_s,
                power_w,
                ambient_c,
                ua,
                g,
                self.element_capacity_j_per_k if lay.element is not None else None,
                self.lag_rate_per_s,
                element_lagged,
                self.element_lag_rate_per_s,
            )
            if evaporated_j > 0.0:
                for i, value in zip(self._temps, temps, strict=True):
                    out[i] = value
                out[lay.ln_c] = self._capacity_after_boiling(c, evaporated_j)
                return out, None, None, evaporated_j
            # no surplus heat: the water leaves the boil and follows the linear model
        sens: tuple | None = None
        if lay.element is None:
            one_node = (
                transition.one_node_step_and_sensitivities
                if sensitivities
                else transition.one_node_step
            )
            temps, m, *rest = one_node(
                x[lay.water], lagged, dt_s, power_w, ambient_c, ua, c, self.lag_rate_per_s
            )
            sens = rest[0] if rest else None
        else:
            temp_array, m, sens = transition.two_node_step_arrays(
                x[lay.water],
                x[lay.element],
                lagged,
                dt_s,
                power_w,
                ambient_c,
                ua,
                c,
                g,
                self.element_capacity_j_per_k,
                self.lag_rate_per_s,
                element_lagged,
                self.element_lag_rate_per_s,
                sensitivities,
            )
            temps = temp_array.tolist()
        for i, value in zip(self._temps, temps, strict=True):
            out[i] = value
        if out[lay.water] <= self.boiling_point_c:
            return out, m, sens, 0.0
        # crossed the boiling point inside the step: clamp, the excess evaporates
        excess_j = c * (out[lay.water] - self.boiling_point_c)
        out[lay.water] = self.boiling_point_c
        out[lay.ln_c] = self._capacity_after_boiling(c, excess_j)
        return out, None, None, excess_j

    def _capacity_after_boiling(self, capacity_j_per_k: float, evaporated_j: float) -> float:
        """Return ln C after ``evaporated_j`` of heat boiled water away (C falls by c_p·Δm)."""
        lost_kg = evaporated_j / self.latent_heat_j_per_kg
        cp = water.specific_heat_j_per_kg_k(min(self.boiling_point_c, water.T_MAX_C))
        floor = max(self._non_water_capacity(), 1.0) + 1.0
        return math.log(max(capacity_j_per_k - cp * lost_kg, floor))

    def _non_water_capacity(self) -> float:
        cfg = self.config
        vessel_c = cfg.vessel_heat_capacity_j_per_k
        if cfg.has_element_sensor:
            vessel_c -= self.element_capacity_j_per_k  # the element is its own node here
        return max(vessel_c, 0.0)

    def _jacobian(
        self,
        x: list[float],
        fx: list[float],
        m: Any,
        sens: Any,
        dt_s: float,
        power_w: float,
        ambient_c: float,
        boiling: bool,
    ) -> np.ndarray:
        """Return F = ∂f/∂x, in closed form off the boil.

        The temperature block is M and the parameter columns are S (exact, from
        :mod:`monitor.physics.transition`). Clamped at the boil, or where S could not be
        formed without losing digits (None), columns are taken by forward differences.
        """
        f = self._eye.copy()
        if m is None:
            columns: list[int] | range = range(self.layout.size)  # clamped: every column
        else:
            f[self._temps_ix] = m
            columns = self._param_columns
            if sens is not None:
                f[self._temps_params_ix] = sens
                return f
        h = 1e-6
        base = np.array(fx)
        for k in columns:
            bumped = list(x)
            bumped[k] += h
            fb, _, _, _ = self._propagate(bumped, dt_s, power_w, ambient_c, boiling)
            f[:, k] = (np.array(fb) - base) / h
        return f

    def _process_noise(self, dt_s: float, boiling: bool, learn_c: bool = True) -> np.ndarray:
        """Return Q for a step of dt_s; ln C walks only while C is learnt (heating, no boil)."""
        key = (dt_s, boiling, learn_c)
        cached = self._q_cache.get(key)
        if cached is not None:
            return cached
        lay, s = self.layout, self.settings
        q = np.zeros(self.layout.size)
        q[lay.water] = s.water_process_sd_c**2 * dt_s
        if lay.element is not None:
            q[lay.element] = s.element_process_sd_c**2 * dt_s
        if lay.lagged is not None:
            q[lay.lagged] = 1e-8 * dt_s
        if lay.element_lagged is not None:
            q[lay.element_lagged] = 1e-8 * dt_s
        q[lay.ln_ua] = s.ua_walk**2 * dt_s
        q[lay.ln_c] = s.capacity_walk**2 * dt_s if learn_c and not boiling else 0.0
        if lay.ln_g is not None:
            q[lay.ln_g] = s.conductance_walk**2 * dt_s
        out = np.diag(q)
        if len(self._q_cache) < 64:
            self._q_cache[key] = out
        return out

    # -- one step -------------------------------------------------------------------------

    def _mean_power_w(self, readings: Mapping[str, float], dt_s: float) -> float:
        energy = readings.get("energy")
        power = readings.get("power")
        mean = None
        if energy is not None and self._last_energy_wh is not None and dt_s > 0.0:
            delta = energy - self._last_energy_wh
            if delta >= 0.0:
                mean = delta * 3600.0 / dt_s
        # A step without the counter breaks the chain of differences: the next reading
        # only re-baselines, instead of putting several intervals' energy in one.
        self._last_energy_wh = energy
        if mean is None:
            mean = power if power is not None else self._last_power_w
        self._last_power_w = power if power is not None else mean
        return max(mean, 0.0)

    def step(self, t_s: float, readings: Mapping[str, float]) -> Estimate | None:
        """Return the estimate after the readings of one instant (°C, W, Wh by channel).

        Returns None until the first water reading has initialised the filter.
        Raises ValueError if time does not move forward.

        A reading no instrument could give (not finite, a temperature at or below
        absolute zero, a power far above the vessel's; :class:`drivers.sample.ReadingLimits`)
        counts as a known-missing one (NaN). A failure inside the filter never leaves
        it: the traceback is logged (in full the first time), the estimator starts
        afresh from the next reading (:meth:`_restart_after`), this step returns None
        and every later estimate of the run carries an ``estimator_fault`` warning.
        """
        if self.core is not None and not t_s > self.t_s:
            raise ValueError(f"time went from {self.t_s} to {t_s} s: not forward")
        limits = self._limits
        ranges = limits.ranges  # ReadingLimits.problem's rule, read once a step
        bad = False
        for k, v in readings.items():
            lo, hi = ranges.get(k, ANY_FINITE)
            if not lo <= v <= hi:
                bad = True
                break
        if bad:
            # a thermocouple's bad reading becomes NaN (the filter watches that sensor
            # and predicts across); any other channel's is simply left out
            clean: dict[str, float] = {}
            for k, v in readings.items():
                if v == v and limits.problem(k, v) is None:
                    clean[k] = v
                elif k in _WATCHED:
                    clean[k] = math.nan
            readings = clean
        try:
            estimate = self._step(t_s, readings)
        except Exception as exc:  # one vessel's failure stays with that vessel
            self._restart_after(t_s, exc)
            return None
        if estimate is not None and self.faults:
            estimate = dataclasses.replace(estimate, flags=(*estimate.flags, self._fault_flag()))
        return estimate

    def _restart_after(self, t_s: float, exc: Exception) -> None:
        """Start afresh after a failure at ``t_s``: the same config, settings and budget."""
        faults = [*self.faults, (t_s, f"{type(exc).__name__}: {exc}")]
        if len(faults) == 1:
            _log.exception("vessel %s: the filter failed at %.1f s; it starts afresh",
                           self.config.vessel, t_s)  # fmt: skip
        else:
            _log.warning("vessel %s: the filter failed again at %.1f s (%s); it starts afresh",
                         self.config.vessel, t_s, faults[-1][1])  # fmt: skip
        self.__init__(self.config, self.settings, self._core_type, self.fit_budget)  # type: ignore[misc]
        self.faults = faults
        flag = self._fault_flag()
        self.totals.flags_raised[flag.name] = flag

    def _fault_flag(self) -> Flag:
        """The ``estimator_fault`` warning of a run whose filter had to start afresh."""
        t_s, reason = self.faults[0]
        more = f" ({len(self.faults)} times in all)" if len(self.faults) > 1 else ""
        return Flag(
            "estimator_fault",
            Level.WARNING,
            f"The filter failed at {t_s:.0f} s ({reason}){more} and started afresh: the "
            "figures since then come from the restarted filter and what it learnt "
            "before is lost. The readings were all recorded.",
            {"faults": float(len(self.faults)), "first_at_s": t_s},
        )

    def _step(self, t_s: float, readings: Mapping[str, float]) -> Estimate | None:
        flags: list[Flag] = []
        ambient = readings.get("ambient")
        if ambient is not None:
            self._last_ambient_c = ambient
        ambient_c = self._last_ambient_c if self._last_ambient_c is not None else 20.0
        if self.core is None:
            water_c = readings.get("water")
            if water_c is None or not self._plausible(water_c):
                return None
            self._last_energy_wh = readings.get("energy")
            self._initialise(t_s, water_c, readings.get("element"))
            dt_s = 0.0
            power_w = readings.get("power") or 0.0
            self._last_power_w = power_w
        else:
            dt_s = t_s - self.t_s
            if not dt_s > 0.0:
                raise ValueError(f"time went from {self.t_s} to {t_s} s: not forward")
            power_w = self._mean_power_w(readings, dt_s)
            self.totals.energy_j += power_w * dt_s
            self._predict(dt_s, power_w, ambient_c)
            self.t_s = t_s
        if self._last_ambient_c is None:
            flags.append(
                Flag(
                    "no_ambient",
                    Level.NOTICE,
                    "No room temperature reading: assuming 20 °C for the losses.",
                )
            )
        raw = readings
        if self.layout.element is not None:
            readings = self._zeroed(readings, power_w)
        self._update(t_s, readings, flags)
        if self.heat_up_fit is not None and not self.totals.reached_target:
            self._fit_step(t_s, power_w, ambient_c, readings)
        if self.layout.element is not None:
            self._watch_element_path(t_s, power_w, raw)
        return self._estimate(t_s, power_w, ambient_c, flags)

    def _zeroed(self, readings: Mapping[str, float], power_w: float) -> Mapping[str, float]:
        """Return the readings with the element thermocouple zeroed against the water's.

        At the first switch-on, the element's mean reading above the water's at rest
        (:class:`ElementPath`, near room temperature) becomes its zero, if there were
        ``element_path_min_readings`` of them and it is within ``element_zero_max_c``
        (a larger one is a fault for a person, not a zero). Two thermocouples that
        disagree by 0.4 K are within type K's tolerance, yet the filter, whose element
        follows the water when off, read such a mismatch as heat and put UA 25 % high
        in cooling (tests/monitor/test_estimator.py, _plate_kettle).
        """
        if self._element_zero_c is None and self._heating(power_w):
            path, s = self._element_path, self.settings
            zero = path.rest_zero_c(s)
            self._element_zero_c = zero if zero is not None else 0.0
            if zero is not None and self.heat_up_fit is not None:
                self.heat_up_fit.shift_element(-zero)  # the pre-roll read raw
        value = readings.get("element")
        if not self._element_zero_c or value is None:
            return readings
        zeroed = dict(readings)
        zeroed["element"] = value - self._element_zero_c
        return zeroed

    def _watch_element_path(
        self, t_s: float, power_w: float, readings: Mapping[str, float]
    ) -> None:
        """Feed :class:`ElementPath` with the instant's readings (see there)."""
        path = self._element_path
        if self._heating(power_w):
            path.restart()
            return
        water_c, element_c = readings.get("water"), readings.get("element")
        ambient_c = readings.get("ambient")
        if water_c is None or element_c is None or ambient_c is None or self._boiling:
            return
        if not (self._plausible(water_c) and self._plausible(element_c)):
            return
        since_s = t_s - self._last_switch_s if self._last_switch_s is not None else math.inf
        s = self.settings
        # at rest: before the first switch-on (however far the fill is from the
        # room) or back near room temperature; cooling: off and settled after heating
        never_heated = self.totals.heating_started_s is None
        if never_heated or water_c - ambient_c <= REST_EXCESS_K:
            if since_s >= s.noise_settle_s:
                path.at_rest(water_c, element_c, ambient_c)
        elif since_s >= s.element_path_settle_s:
            path.cooling(t_s, water_c, element_c, ambient_c)

    def _lag_difference_s(self) -> tuple[float, float]:
        """Return τ_w − τ_e (s) and its 1σ: the heat-up fit's, else the filter's with 1 s."""
        fit = self.heat_up_fit.fit if self.heat_up_fit is not None else None
        if fit is not None and self.layout.element is not None:
            bf = batchfit
            tw, te = math.exp(fit.theta[bf.LN_TAU_W]), math.exp(fit.theta[bf.LN_TAU_E])
            cov = fit.cov
            var = (
                tw * tw * cov[bf.LN_TAU_W, bf.LN_TAU_W]
                + te * te * cov[bf.LN_TAU_E, bf.LN_TAU_E]
                - 2.0 * tw * te * cov[bf.LN_TAU_W, bf.LN_TAU_E]
            )
            return tw - te, math.sqrt(max(var, 0.0))
        tw = 1.0 / self.lag_rate_per_s if self.lag_rate_per_s else 0.0
        te = 1.0 / self.element_lag_rate_per_s if self.element_lag_rate_per_s else 0.0
        return tw - te, 1.0

    # -- the batch fit of the first heat-up ---------------------------------------------

    def _heating(self, power_w: float) -> bool:
        rated = self.config.rated_power_w or 0.0
        return power_w > max(self.settings.heating_power_w, 0.02 * rated)

    def _fit_step(
        self, t_s: float, power_w: float, ambient_c: float, readings: Mapping[str, float]
    ) -> None:
        """Feed the heat-up window, carry the fit's temperatures on, and fit when due."""
        fit = self.heat_up_fit
        water_c = readings.get("water")
        element_c = readings.get("element") if self.layout.element is not None else None
        water_c = water_c if water_c is not None and self._plausible(water_c) else None
        element_c = element_c if element_c is not None and self._plausible(element_c) else None
        fit.add(t_s, power_w, ambient_c, water_c, element_c, self._heating(power_w))
        if self._fit_state is not None and fit.fit is not None:
            # between fits, the fitted model carries the true temperatures on, open loop
            dt_s = t_s - self._fit_anchored_s
            if dt_s > 0.0:
                th = fit.fit.theta
                (t_w, t_e), _ = transition.two_node_step(
                    self._fit_state[1], self._fit_state[0], None, dt_s, power_w, ambient_c,
                    math.exp(th[0]), math.exp(th[1]), math.exp(th[2]), math.exp(th[3]),
                    None, None, None,
                )  # fmt: skip
                self._fit_state = (t_e, t_w)
                self._fit_anchored_s = t_s
        budget = self.fit_budget
        due = fit.due(t_s)
        if due and (budget is None or budget.allow()):
            started_s = time.thread_time()
            # the same reading noise the filter weighs its updates with
            noise = (self.reading_noise_sd_c("water"), self.reading_noise_sd_c("element"))
            result = fit.run(t_s, noise)
            if result is not None:
                self._anchor(t_s, result, power_w, ambient_c)
            if budget is not None:
                budget.charge(time.thread_time() - started_s)
            self._fit_waiting_since_s = None
        elif due and self._fit_waiting_since_s is None:
            self._fit_waiting_since_s = t_s  # put off by the live service's budget

    def _anchor(
        self, t_s: float, result: batchfit.FitResult, power_w: float, ambient_c: float
    ) -> None:
        """Re-anchor the filter on a fit: its parameters, lags, temperatures and covariance."""
        lay, bf = self.layout, batchfit
        th = result.theta
        end, end_j = result.end_state, result.end_jacobian
        self._fit_state = (float(end[0]), float(end[1]))
        self._fit_anchored_s = t_s
        self._fit_eta_rel_sd = self._fit_eta_spread(result, power_w, ambient_c)
        if result.early_factor > ANCHOR_EARLY_FACTOR:
            # too early in the heat-up: the fit's figures are reported with their wide
            # std's, but a covariance that wide would throw the filter's linearised
            # updates about (a 0.9 kg kettle "boiled dry" 13 s after switch-on)
            return
        c, ce = math.exp(th[bf.LN_C]), math.exp(th[bf.LN_CE])
        self.element_capacity_j_per_k = ce
        if self.lag_rate_per_s is not None:
            self.lag_rate_per_s = 1.0 / math.exp(th[bf.LN_TAU_W])
        if self.element_lag_rate_per_s is not None and result.has_element:
            self.element_lag_rate_per_s = 1.0 / math.exp(th[bf.LN_TAU_E])
        # T = ∂(filter state)/∂θ, so the filter's covariance is T Σ Tᵀ with every
        # correlation the fit knows of (temperatures with parameters included)
        p = len(th)
        x = self.core.x.copy()
        jac = np.zeros((lay.size, p))
        rows = [(lay.element, 0), (lay.water, 1), (lay.lagged, 2), (lay.element_lagged, 3)]
        for i, k in rows:
            if i is not None and k < len(end):
                x[i] = end[k]
                jac[i] = end_j[k]
        x[lay.ln_ua] = th[bf.LN_UA]
        jac[lay.ln_ua, bf.LN_UA] = 1.0
        if lay.element is not None:
            x[lay.ln_c] = th[bf.LN_C]
            jac[lay.ln_c, bf.LN_C] = 1.0
            x[lay.ln_g] = th[bf.LN_G]
            jac[lay.ln_g, bf.LN_G] = 1.0
        else:  # one node: its C lumps the element in
            x[lay.ln_c] = math.log(c + ce)
            jac[lay.ln_c, bf.LN_C] = c / (c + ce)
            jac[lay.ln_c, bf.LN_CE] = ce / (c + ce)
        # the temperatures at the window's end are pinned by the readings: they take the
        # fit's statistical covariance; the parameters get the structural floor on top
        cov = jac @ result.statistical_cov @ jac.T
        floor = batchfit.STRUCTURAL_LN_SD
        cov[lay.ln_ua, lay.ln_ua] += floor[bf.LN_UA] ** 2
        cov[lay.ln_c, lay.ln_c] += floor[bf.LN_C] ** 2
        if lay.ln_g is not None:
            cov[lay.ln_g, lay.ln_g] += floor[bf.LN_G] ** 2
        for i in self._temps:
            cov[i, i] += self.settings.water_noise_sd_c**2
        self.core.predict(x, np.eye(lay.size), np.zeros((lay.size, lay.size)))
        self.core.P = 0.5 * (cov + cov.T)

    def _fit_eta_spread(
        self, result: batchfit.FitResult, power_w: float, ambient_c: float
    ) -> float:
        """Return the fit's time-to-target 1σ over the time itself, from sigma points.

        The sigma points take the fit's statistical covariance, whose correlations
        pin the time far better than each parameter alone; what the model leaves out
        is the separate fractional term ``fit_forecast_model_error`` times the fit's
        early factor (:func:`_fit_forecast`).
        """
        th = result.theta
        eta = self._fit_time_to_target(th, result.end_state, power_w, ambient_c)
        if eta is None or eta <= 0.0:
            return 0.0

        def eta_at(d: np.ndarray) -> float | None:
            state = result.end_state + result.end_jacobian @ d
            return self._fit_time_to_target(th + d, state, power_w, ambient_c)

        sd = sigma_point_sd(eta_at, result.statistical_cov, eta)
        return 1.0 if sd is None else sd / eta  # None: part of the interval never gets there

    def _fit_time_to_target(
        self, theta: np.ndarray, state: np.ndarray, power_w: float, ambient_c: float
    ) -> float | None:
        ua, c, g, ce = (math.exp(v) for v in theta[:4])
        return transition.two_node_time_to_target(
            float(state[1]), float(state[0]), self.target_c, power_w, ambient_c, ua, c, g, ce
        )

    def _fit_figures(
        self, water_c: float
    ) -> tuple[Estimated, Estimated, Estimated, Estimated | None]:
        """Return (UA, C, water mass, G) from the latest fit, with honest std's."""
        bf = batchfit
        result = self.heat_up_fit.fit
        th, cov = result.theta, result.cov
        ua, c, g, ce = (math.exp(v) for v in th[:4])
        ua_est = Estimated(ua, ua * result.ln_sd(bf.LN_UA))
        total = c + ce
        var_total = (
            c * c * cov[bf.LN_C, bf.LN_C]
            + ce * ce * cov[bf.LN_CE, bf.LN_CE]
            + 2.0 * c * ce * cov[bf.LN_C, bf.LN_CE]
        )
        sd_total = math.sqrt(max(var_total, 0.0))

        # the fit's C holds the water at the mean c_p over the rise it saw (from its
        # fitted start to the water now), not at c_p now: 0.7 % apart at the boil
        def clip(t_c: float) -> float:
            return min(max(t_c, 0.0), water.T_MAX_C)

        cp = water.mean_specific_heat_j_per_kg_k(clip(float(th[bf.T0])), clip(water_c))
        unseen, unseen_sd = self._unseen_vessel_capacity_j_per_k(ce)
        mass = (total + unseen - self.config.vessel_heat_capacity_j_per_k) / cp
        sd_mass = math.hypot(sd_total, unseen_sd) / cp
        # The heat those lagging parts take up, unseen·dT/dt, is a flow the fit can as
        # well read as loss: UA is uncertain by that flow over the water's excess on
        # the room, 1σ (the heat-up's mean rate; on bench_worlds the kettles' UA read
        # high during the heat-up, error/std 2.2-2.8 without it). Nil on a heater,
        # whose parts keep up over hours.
        fit = self.heat_up_fit
        heated_s = self.t_s - fit.heating_since_s if fit.heating_since_s is not None else 0.0
        excess_k = water_c - (self._last_ambient_c if self._last_ambient_c is not None else 20.0)
        if heated_s > 0.0 and excess_k > 1.0:
            rate_k_per_s = max(water_c - float(th[bf.T0]), 0.0) / heated_s
            ua_est = Estimated(ua, math.hypot(ua_est.std, unseen * rate_k_per_s / excess_k))
        if self.layout.element is not None:
            c_est = Estimated(c, c * result.ln_sd(bf.LN_C))
            g_est = Estimated(g, g * result.ln_sd(bf.LN_G))
        else:
            c_est = Estimated(total, sd_total)
            g_est = None
        return ua_est, c_est, Estimated(mass, sd_mass), g_est

    def _unseen_vessel_capacity_j_per_k(self, element_j_per_k: float) -> tuple[float, float]:
        """Return the part of the vessel's heat capacity a heat-up has not yet warmed (J/K).

        The vessel's heat capacity from its commissioning (``vessel_heat_capacity_j_per_k``)
        includes parts beside the element that follow the water with a lag of their own:
        a lid, a handle, a wall behind an air gap. On a ramp, a part with lag τ stays
        τ·dT/dt behind the water, so after t s of heating it holds about t/(t + τ) of
        the heat it would at the water's temperature, and the fit's heat capacity lacks
        the rest. Returned: that rest, C_parts·τ/(τ + t), with C_parts the vessel's
        capacity less the fitted element's and τ = ``vessel_part_lag_s``, and its 1σ,
        ``vessel_part_lag_rel_sd`` of itself (τ is not known: our judgement, checked on
        benchmarks/bench_worlds.py, where a kettle's lid and wall made the water mass
        2-3 % low at mid heat-up without it, and it correlated 0.85 with this). A heater's
        heat-up takes hours, so there it is well under 1 %.
        """
        fit, s = self.heat_up_fit, self.settings
        since = fit.heating_since_s if fit is not None else None
        parts = max(self.config.vessel_heat_capacity_j_per_k - element_j_per_k, 0.0)
        if since is None or parts == 0.0:
            return 0.0, 0.0
        heated_s = max(self.t_s - since, 0.0)
        unseen = parts * s.vessel_part_lag_s / (s.vessel_part_lag_s + heated_s)
        return unseen, s.vessel_part_lag_rel_sd * unseen

    def _fit_forecast(self, power_w: float, ambient_c: float) -> TargetForecast | None:
        """Return the time to target from the fit's temperatures now (None: ask the filter)."""
        if self._fit_state is None:
            return None
        state = np.array([self._fit_state[0], self._fit_state[1]])
        theta = self.heat_up_fit.fit.theta
        eta = self._fit_time_to_target(theta, state, power_w, ambient_c)
        if eta is None:
            return None
        # The power over the rest of the heat-up, not the power now: the mains wander,
        # and over a long horizon the heat-up's mean power predicts the mean to come
        # better than the latest reading (on bench_worlds' heaters the countdown
        # jumped 2-7 % between deciles, the 90 % interval covering half the time, with
        # the heating power's 2 % wander). With a memory τ (forecast_power_memory_s),
        # the reading now keeps the weight w = (τ/H)(1 - e^(-H/τ)) over the horizon H.
        # What remains unknown of the mean power to come, the heat-up's power sd times
        # √(2τ/(H + 2τ)) (an average over H of a process with memory τ) and (1 - w),
        # is added to the interval as the same share of the time.
        stats = self.heat_up_fit.heating_power_w(self.settings.forecast_power_memory_s)
        power_rel_sd = 0.0
        if stats is not None and eta > 0.0:
            mean_w, rel_sd = stats
            tau = self.settings.forecast_power_memory_s
            w = tau / eta * (1.0 - math.exp(-eta / tau))
            ahead_w = w * power_w + (1.0 - w) * mean_w
            if ahead_w != power_w:
                later = self._fit_time_to_target(theta, state, ahead_w, ambient_c)
                if later is not None:
                    eta = later
            power_rel_sd = (1.0 - w) * rel_sd * math.sqrt(2.0 * tau / (eta + 2.0 * tau))
        self.heat_up_fit.expect_end(eta)
        model = self.settings.fit_forecast_model_error * self.heat_up_fit.fit.early_factor
        floor_s = self.settings.fit_forecast_floor_s
        spread = math.sqrt(
            (eta * self._fit_eta_rel_sd) ** 2 + (eta * model) ** 2 + (eta * power_rel_sd) ** 2
            + floor_s**2
        )  # fmt: skip
        return TargetForecast(
            self.target_c, eta, max(eta - Z_90 * spread, 0.0), eta + Z_90 * spread
        )

    def _predict(self, dt_s: float, power_w: float, ambient_c: float) -> None:
        core, lay = self.core, self.layout
        heating = self._heating(power_w)
        switched_w = abs(power_w - self._previous_mean_power_w)
        self._previous_mean_power_w = power_w
        if switched_w > 0.2 * (self.config.rated_power_w or 2000.0):
            self._last_switch_s = self.t_s
        t_since_switch = (
            self.t_s - self._last_switch_s if self._last_switch_s is not None else math.inf
        )
        x_array = core.x
        boiling = self._boiling and x_array[lay.water] >= self.boiling_point_c - 1e-9
        if self._fused and not boiling:
            # the usual step, in one compiled call (the same figures as the path below)
            q = self._step_noise(dt_s, heating, False, switched_w, t_since_switch, x_array)
            lagged_ix, element_lagged_ix = self._lag_ix
            if lay.element is None:
                done, fx_array, p = transition.one_node_predict(
                    x_array, core.P, q, dt_s, power_w, ambient_c, lagged_ix,
                    self.lag_rate_per_s or math.nan, self.boiling_point_c,
                )  # fmt: skip
            else:
                done, fx_array, p = transition.two_node_predict(
                    x_array, core.P, q, dt_s, power_w, ambient_c, self.element_capacity_j_per_k,
                    lagged_ix, self.lag_rate_per_s or math.nan, element_lagged_ix,
                    self.element_lag_rate_per_s or math.nan, self.boiling_point_c,
                )  # fmt: skip
            if done:
                core.x, core.P = fx_array, p
                self._boiling = False
                return
        x = x_array.tolist()
        fx, m, sens, evaporated_j = self._propagate(x, dt_s, power_w, ambient_c, boiling, True)
        f = self._jacobian(x, fx, m, sens, dt_s, power_w, ambient_c, boiling)
        self.totals.evaporated_kg += evaporated_j / self.latent_heat_j_per_kg
        clamped = m is None
        q = self._step_noise(dt_s, heating, clamped, switched_w, t_since_switch, x)
        core.predict(np.array(fx), f, q)
        self._boiling = clamped
        if clamped:
            # C is not learnt on the boil: cut its correlations so readings cannot move it
            keep = core.P[lay.ln_c, lay.ln_c]
            core.P[lay.ln_c, :] = 0.0
            core.P[:, lay.ln_c] = 0.0
            core.P[lay.ln_c, lay.ln_c] = keep

    def _step_noise(
        self,
        dt_s: float,
        heating: bool,
        clamped: bool,
        switched_w: float,
        t_since_switch: float,
        x: Sequence[float],
    ) -> np.ndarray:
        """Return the step's Q for the state ``x`` before it, and set what the instant's
        updates need to know of the step."""
        lay, s = self.layout, self.settings
        # C is learnt only while the element heats: with no heating power over the step
        # the water's heat capacity is barely observable (idle and cooling show UA/C,
        # which UA takes up), so ln C gets no random walk here and zero gain in _update
        self._learn_c = heating and not clamped
        q = self._process_noise(dt_s, clamped, self._learn_c)
        # idle and settled: the readings' noise can be measured (NoiseTracker)
        self._noise_idle = not heating and not clamped and t_since_switch >= s.noise_settle_s
        if switched_w > 0.0 and lay.element is not None:
            # Only the mean power over the interval is known, not when inside it the
            # element switched: allow for half the step's energy change landing early
            # or late in the element (and its sensor).
            sd_c = 0.5 * switched_w * dt_s / self.element_capacity_j_per_k
            q = q.copy()
            for i in (lay.element, lay.element_lagged):
                if i is not None:
                    q[i, i] += sd_c * sd_c
        elif switched_w > 0.0 or t_since_switch < s.settle_after_switch_s:
            # One node: the element is not modelled, yet after a switch it stores or gives
            # back about C_e·ΔP/G before the water sees the change. Let the water state take
            # that up (G unknown: a typical 40 K per rated kW-ish over-temperature, doubled).
            _, c, _ = self._params(x)
            rated = self.config.rated_power_w or 2000.0
            over_k = switched_w * 40.0 / rated
            sd_c = 2.0 * self.element_capacity_j_per_k * over_k / c
            # and while the element settles after a switch (a few of its C_e/G, longer
            # with scale) the water does not yet follow the one-node model: more model error
            var_c = sd_c * sd_c + (
                s.settle_water_sd_c**2 * dt_s if t_since_switch < s.settle_after_switch_s else 0.0
            )
            q = q.copy()
            for i in (lay.water, lay.lagged):
                if i is not None:
                    q[i, i] += var_c
            if lay.lagged is not None:
                q[lay.water, lay.lagged] = q[lay.lagged, lay.water] = var_c
        return q

    def _plausible(self, value_c: float) -> bool:
        lo, hi = self.settings.plausible_c
        return math.isfinite(value_c) and lo <= value_c <= hi

    # Set by _predict for the readings of the same instant; before the first predict
    # (the readings that start the filter) C is not learnt and nothing is idle yet.
    _learn_c: bool = False
    _noise_idle: bool = False

    def reading_noise_sd_c(self, name: str) -> float:
        """Return the reading noise sd (K) the filter uses for the ``water`` or ``element``
        thermocouple: the setting, or the idle estimate when that is larger."""
        s = self.settings
        sd = s.water_noise_sd_c if name == "water" else s.element_noise_sd_c
        measured = self._watch[name].noise.sd_c
        return max(sd, measured) if measured is not None else sd

    def idle_noise_sd_c(self, name: str) -> float | None:
        """Return the thermocouple's reading noise sd (K) measured while idle, or None yet."""
        return self._watch[name].noise.sd_c

    def _update(self, t_s: float, readings: Mapping[str, float], flags: list[Flag]) -> None:
        """Apply the instant's thermocouple readings: robust, bounded scalar updates.

        For each reading, with ν its innovation, r its variance and S = P_jj + r:
          z = |ν|/√S                      how far out, in its own sd's
          z > gross_error_sd              set aside (rejected_readings), flagged
          z > huber_k = k                 r' = S·z/k - P_jj, so S' = S·z/k and the gain
                                          is k/z of the full one (Huber), flagged past
                                          the 99.9 % point (gate_nis)
          max_i |P_ij ν| / S' > B         (i over ln UA, ln C, ln G that are learnt)
                                          r' = max_i |P_ij ν| / B - P_jj: the whole
                                          gain is scaled so no parameter moves more
                                          than B = max_param_step
        and then an ordinary update with r'. The reacquire_after-th reading in a row
        with z > k first widens the sensor's temperatures (:meth:`_reacquire`) and is
        then weighed against the widened prior. Raising r rather than scaling the gain by
        hand keeps the covariance the one of the gain actually used (P - K S' Kᵀ is the
        Joseph form for the optimal gain of r'), and the filterpy path can take it as
        it is. Down-weighted and bounded readings count in downweighted_readings.
        """
        s, core = self.settings, self.core
        self._nis = None
        # a consider update for ln C unless the element heats off the boil (_predict)
        consider = self._boiling or not self._learn_c
        frozen = self._frozen_c if consider else ()
        learnt = self._learnt_without_c if consider else self._param_columns
        learnt_ix, frozen_mask = self._update_arrays[consider]
        # past either, a reading takes the general path below (Huber, set aside, flags)
        aside_above = min(s.huber_k, s.gross_error_sd)
        for name, j in self._channels:
            value = readings.get(name)
            if value is None:
                continue
            watch = self._watch[name]
            if not self._plausible(value):
                watch.noise.break_chain()
                flags.append(
                    Flag(
                        f"{name}_sensor_fault",
                        Level.WARNING,
                        f"The {name} thermocouple reads {value:g} °C, which cannot be "
                        "right (open circuit or wiring fault): predicting without it.",
                        {"reading_c": value},
                    )
                )
                continue
            if self._stuck(t_s, name, value, core.x[j]):
                watch.noise.break_chain()
                flags.append(
                    Flag(
                        f"{name}_sensor_stuck",
                        Level.WARNING,
                        f"The {name} thermocouple has read exactly {value:g} °C for over "
                        f"{s.stuck_after_s:.0f} s while the vessel should have changed: "
                        "predicting without it.",
                        {"reading_c": value},
                    )
                )
                continue
            if self._noise_idle:
                watch.noise.add(t_s, value, s)
            else:
                watch.noise.break_chain()
            sd = self.reading_noise_sd_c(name)
            r = sd * sd
            if self._fused:  # the usual reading in one compiled call (bit for bit the same)
                code, nis, x_new, p_new = kernels.bounded_update(
                    core.x, core.P, j, float(value), r, aside_above, s.gate_nis,
                    s.max_param_step, learnt_ix, frozen_mask,
                )  # fmt: skip
                if code != 2:
                    core.x, core.P = x_new, p_new
                    if name == "water":
                        self._nis = nis
                        self.totals.water_readings += 1
                        self.totals.nis_sum += nis
                    watch.missed_in_row = 0
                    watch.smallest_miss_c = math.inf
                    if code == 1:
                        self.totals.downweighted_readings += 1
                    continue
            nu, var = core.innovation(j, value, r)
            nis = nu * nu / var
            if name == "water":
                self._nis = nis
                self.totals.water_readings += 1
                self.totals.nis_sum += nis
            miss = math.sqrt(nis)
            if miss > s.huber_k:
                watch.missed_in_row += 1
                watch.smallest_miss_c = min(watch.smallest_miss_c, abs(nu))
                if watch.missed_in_row >= s.reacquire_after:
                    added_c = self._reacquire(name, watch.smallest_miss_c)
                    flags.append(
                        Flag(
                            f"{name}_reacquired",
                            Level.NOTICE,
                            f"The {name} reading disagreed with the model "
                            f"{watch.missed_in_row} times in a row: the filter widened its "
                            f"{name} temperature uncertainty by {added_c:.2f} K so the "
                            "readings can pull it back, and left the parameters as they were.",
                            {"reading_c": value, "nis": nis, "added_sd_c": added_c},
                        )
                    )
                    watch.missed_in_row = 0
                    watch.smallest_miss_c = math.inf
                    nu, var = core.innovation(j, value, r)
                    miss = abs(nu) / math.sqrt(var)
            else:
                watch.missed_in_row = 0
                watch.smallest_miss_c = math.inf
            if miss > s.gross_error_sd:
                self.totals.rejected_readings += 1
                flags.append(
                    Flag(
                        f"{name}_outlier",
                        Level.NOTICE,
                        f"{_a(name).capitalize()} {name} reading of {value:g} °C was "
                        f"{miss:.0f} standard deviations from the model: set aside as a "
                        "gross error.",
                        {"reading_c": value, "nis": nis, "innovation_c": nu, "weight": 0.0},
                    )
                )
                continue
            p_jj = var - r
            r_used = r
            if miss > s.huber_k:
                # Huber: S' = S·z/k, so the gain (and the step) is k/z of the full one
                r_used = var * miss / s.huber_k - p_jj
            # Bound the parameters' step: a large innovation just inside the old gate
            # once moved ln C and ln G by about 1 in one linearised update (C 7 -> 17
            # kJ/K). Raising r scales the whole gain vector, temperatures included, so
            # the update stays one of the filter's own, with a consistent covariance.
            if learnt:
                column = core.P[:, j].tolist()  # plain floats: faster for 2-3 entries
                largest = abs(column[learnt[0]])  # max() over the learnt, written out
                for i in learnt[1:]:
                    if abs(column[i]) > largest:
                        largest = abs(column[i])
                pull = largest * abs(nu)
                if pull > s.max_param_step * (p_jj + r_used):
                    r_used = pull / s.max_param_step - p_jj
            weight = (p_jj + r) / (p_jj + r_used)
            if r_used > r:
                self.totals.downweighted_readings += 1
            if nis > s.gate_nis:
                flags.append(
                    Flag(
                        f"{name}_outlier",
                        Level.NOTICE,
                        f"{_a(name).capitalize()} {name} reading of {value:g} °C was "
                        f"{miss:.1f} standard deviations from the model: used at "
                        f"{weight:.0%} weight.",
                        {"reading_c": value, "nis": nis, "innovation_c": nu, "weight": weight},
                    )
                )
            core.update(j, value, r_used, frozen)

    def _stuck(self, t_s: float, name: str, value: float, model_c: float) -> bool:
        watch, s = self._watch[name], self.settings
        if watch.last_value != value:
            watch.last_value = value
            watch.same_since_s = t_s
            watch.model_at_same = model_c
            return False
        if watch.same_since_s is None or watch.model_at_same is None:
            return False
        long_enough = t_s - watch.same_since_s >= s.stuck_after_s
        return long_enough and abs(model_c - watch.model_at_same) > 1.0

    def _reacquire(self, name: str, miss_c: float) -> float:
        """Return the sd (K) added to a sensor's temperature states that lost the readings.

        The model has lost the temperature when readings disagree many times in a row.
        Nothing is reset and no covariance is cut: variance is added to the sensor's
        group (water and its lagged thermocouple, or the element and its own), fully
        correlated within the group, so that the sensor's S = P_jj + r grows to the
        smallest miss of the run, miss_c² (K²). The water and its lagged sensor then
        move together under the next ordinary updates, keeping the lag between them
        (a heat-up holds the water tau·dT/dt ahead of its thermocouple), and the
        parameters keep their covariance with the temperatures, so the few readings
        that bring the temperature back teach them little.
        """
        lay, core = self.layout, self.core
        idx = [lay.water] + ([lay.lagged] if lay.lagged is not None else [])
        if name == "element" and lay.element is not None:
            idx = [lay.element] + ([lay.element_lagged] if lay.element_lagged is not None else [])
        j = idx[-1]  # the state the sensor reads
        sd = self.reading_noise_sd_c(name)
        added = miss_c * miss_c - (core.P[j, j] + sd * sd)
        if not added > 0.0:
            return 0.0
        q = np.zeros((lay.size, lay.size))
        q[np.ix_(idx, idx)] = added
        # through the core's own predict (x unchanged, F = I), so the filterpy twin
        # sees the same operation
        core.predict(core.x.copy(), self._eye, q)
        return math.sqrt(added)

    # -- what the operator sees -----------------------------------------------------------

    def _estimate(
        self, t_s: float, power_w: float, ambient_c: float, flags: list[Flag]
    ) -> Estimate:
        lay, s, cfg, tot = self.layout, self.settings, self.config, self.totals
        x = self.core.x.tolist()
        variances = self.core.P.diagonal().tolist()

        def sd(i: int) -> float:  # a state's standard deviation, from the diagonal read once
            return math.sqrt(max(variances[i], 0.0))

        ua, c, g = self._params(x)
        water_c = x[lay.water]
        ua_est = Estimated(ua, ua * math.hypot(sd(lay.ln_ua), s.ua_model_rel_sd))
        c_est = Estimated(c, c * sd(lay.ln_c))
        cp = water.specific_heat_j_per_kg_k(min(max(water_c, 0.0), water.T_MAX_C))
        mass = (c - self._non_water_capacity()) / cp
        mass_est = Estimated(mass, c_est.std / cp)
        g_est = Estimated(g, g * sd(lay.ln_g)) if g is not None else None
        fitted = (
            self.heat_up_fit is not None
            and self.heat_up_fit.fit is not None
            and not tot.reached_target
        )
        if fitted:  # the heat-up's batch fit speaks for the parameters
            ua_est, c_est, mass_est, g_est = self._fit_figures(water_c)
            ua, c = ua_est.value, c_est.value
            g = g_est.value if g_est is not None else None
            mass = mass_est.value
        heating = self._heating(power_w)
        unfitted = (
            heating
            and self.heat_up_fit is not None
            and self.heat_up_fit.fit is None
            and not tot.reached_target
        )
        if unfitted:
            # switched on, not yet fitted: the filter alone cannot know the parameters
            # yet (the first seconds are the element's and the sensors'), so say so
            ua_est, c_est, mass_est = (
                Estimated(v.value, max(v.std, UNFITTED_RELATIVE_SD * abs(v.value)))
                for v in (ua_est, c_est, mass_est)
            )
            if g_est is not None:
                g_est = Estimated(g_est.value, max(g_est.std, UNFITTED_RELATIVE_SD * g_est.value))

        phase = self._phase(heating, water_c, ambient_c)
        if phase is Phase.COOLING and g is not None and not fitted:
            share = self._element_path.share(*self._lag_difference_s(), s)
            if share is not None:
                g_sd = g_est.std if g_est is not None else 0.0
                ua_est = Estimated(
                    ua + g * share.value,
                    math.sqrt(ua_est.std**2 + (share.value * g_sd) ** 2 + (g * share.std) ** 2),
                )
                ua = ua_est.value

        self._track_heat_up(t_s, heating, water_c, phase, g_est)

        waiting = self._fit_waiting_since_s
        if waiting is not None and not tot.reached_target and t_s - waiting >= s.fit_wait_notice_s:
            flags.append(
                Flag(
                    "fit_waiting",
                    Level.NOTICE,
                    f"The heat-up fit has waited {t_s - waiting:.0f} s for processor time "
                    "(many vessels heating at once): these figures come from an older fit. "
                    "A replay of the log gives them with every fit made on time.",
                    {"waiting_s": t_s - waiting},
                )
            )

        target = self._forecast(heating, fitted, unfitted, water_c, power_w, ambient_c, flags)
        evaporation, to_dry = self._boil_off(heating, water_c, ambient_c, power_w, ua, g, mass,
                                             flags)  # fmt: skip
        standing = None
        if cfg.target_c is not None:
            loss = ua * (water_c - ambient_c)
            standing = Estimated(loss, ua_est.std * abs(water_c - ambient_c))
        for flag in flags:
            tot.flags_raised.setdefault(flag.name, flag)
            if flag.level is Level.ALARM:
                tot.flags_raised[flag.name] = flag
        return Estimate(
            t_s=t_s,
            vessel=cfg.vessel,
            phase=phase,
            water_c=water_c,
            water_std_c=sd(lay.water),
            element_c=x[lay.element] if lay.element is not None else None,
            ambient_c=ambient_c,
            power_w=power_w,
            ua_w_per_k=ua_est,
            heat_capacity_j_per_k=c_est,
            water_mass_kg=mass_est,
            element_conductance_w_per_k=g_est,
            boiling_point_c=self.boiling_point_c,
            target=target,
            boil_off_to_dry_s=to_dry,
            evaporation_kg_per_s=evaporation,
            standing_loss_w=standing,
            nis=self._nis,
            flags=tuple(flags),
        )

    def _phase(self, heating: bool, water_c: float, ambient_c: float) -> Phase:
        """Return the vessel's phase now (boiling, holding, heating, cooling or idle)."""
        s, cfg, tot = self.settings, self.config, self.totals
        if self._boiling and heating:
            phase = Phase.BOILING
        elif (
            cfg.target_c is not None
            and tot.reached_target
            and (water_c >= cfg.target_c - s.hold_band_k)
        ):
            phase = Phase.HOLDING
        elif heating:
            phase = Phase.HEATING
        elif water_c > ambient_c + REST_EXCESS_K:
            phase = Phase.COOLING
        else:
            phase = Phase.IDLE
        return phase

    def _track_heat_up(
        self, t_s: float, heating: bool, water_c: float, phase: Phase, g_est: Estimated | None
    ) -> None:
        """Keep the run's heat-up totals: its start, its end at the target, G at 80 % of
        the rise, and the holding time."""
        tot = self.totals
        if heating and tot.heating_started_s is None:
            tot.heating_started_s = t_s
            tot.heat_up_start_c = water_c
            tot.heat_up_start_energy_j = tot.energy_j
        if not tot.reached_target and (water_c >= self.target_c - 0.05 or self._boiling):
            tot.reached_target = True
            if tot.heating_started_s is not None:
                tot.heat_up_done_s = t_s
                tot.heat_up_energy_j = tot.energy_j - tot.heat_up_start_energy_j
        if (
            g_est is not None
            and not tot.reached_target
            and tot.heat_up_start_c is not None
            and water_c >= tot.heat_up_start_c + 0.8 * (self.target_c - tot.heat_up_start_c)
            and self._g_at_80 is None
        ):
            self._g_at_80 = g_est
        if phase is Phase.HOLDING:
            tot.holding_sum_c += water_c
            tot.holding_steps += 1

    def _forecast(
        self,
        heating: bool,
        fitted: bool,
        unfitted: bool,
        water_c: float,
        power_w: float,
        ambient_c: float,
        flags: list[Flag],
    ) -> TargetForecast | None:
        """Return the time to the target with its 90 % interval while heating towards it
        (from the heat-up fit while it speaks, else the filter's sigma points), or None."""
        s = self.settings
        target = None
        if s.forecast and heating and not self._boiling and water_c < self.target_c:
            target = self._fit_forecast(power_w, ambient_c) if fitted else None
            if target is None:
                target = forecast_time_to_target(self, power_w, ambient_c)
                if unfitted and target.eta_s is not None:
                    half = Z_90 * UNFITTED_RELATIVE_SD * target.eta_s
                    target = TargetForecast(
                        target.target_c,
                        target.eta_s,
                        max(min(target.lo_s or 0.0, target.eta_s - half), 0.0),
                        max(target.hi_s or 0.0, target.eta_s + half),
                        target.reason,
                    )
            if not target.reachable:
                flags.append(
                    Flag(
                        "target_unreachable",
                        Level.NOTICE,
                        target.reason,
                        {"target_c": self.target_c, "power_w": power_w},
                    )
                )
        return target

    def _boil_off(
        self,
        heating: bool,
        water_c: float,
        ambient_c: float,
        power_w: float,
        ua: float,
        g: float | None,
        mass: float,
        flags: list[Flag],
    ) -> tuple[float, float | None]:
        """Return the evaporation (kg/s) while boiling and the time (s) until the water
        is gone at that rate (None when not boiling), raising ``dry_boil`` when it is
        near."""
        lay, s, x = self.layout, self.settings, self.core.x
        evaporation = 0.0
        to_dry = None
        if self._boiling and heating:
            into_w = power_w
            if lay.element is not None:
                into_w = g * (x[lay.element] - water_c)
            evaporation = max(into_w - ua * (water_c - ambient_c), 0.0) / self.latent_heat_j_per_kg
            if evaporation > 0.0:
                to_dry = max(mass, 0.0) / evaporation
                if mass < s.dry_mass_kg or to_dry < 60.0:
                    flags.append(
                        Flag(
                            "dry_boil",
                            Level.ALARM,
                            f"Boiling with about {max(mass, 0.0):.2f} kg of water left "
                            f"({to_dry:.0f} s to dry at this rate): switch the element "
                            "off before it runs dry. Do not open the vessel while it "
                            "boils.",
                            {"water_mass_kg": mass, "to_dry_s": to_dry},
                        )
                    )
                elif to_dry < 300.0:
                    flags.append(
                        Flag(
                            "dry_boil",
                            Level.WARNING,
                            f"Boiling on: about {to_dry:.0f} s until the water is gone "
                            "at this rate. An element that runs dry can burn out.",
                            {"water_mass_kg": mass, "to_dry_s": to_dry},
                        )
                    )
        return evaporation, to_dry

    @property
    def conductance_at_80_percent(self) -> Estimated | None:
        """Return G as estimated when the first heat-up passed 80 % of its rise, or None."""
        return self._g_at_80

    def forecast_state(self) -> tuple[np.ndarray, np.ndarray]:
        """Return (mean, covariance) of the states a forecast depends on."""
        idx, block = self._forecast_ix
        return self.core.x[idx], self.core.P[block]


def _times_to_target(
    est: VesselEstimator, points: np.ndarray, power_w: float, ambient_c: float
) -> list[float | None]:
    """Return the time (s) to the target from each row of ``points`` (:meth:`forecast_state`
    order), None where it is never reached."""
    if est.layout.element is None:
        return [
            transition.one_node_time_to_target(
                water_c, est.target_c, power_w, ambient_c, math.exp(ln_ua), math.exp(ln_c)
            )
            for water_c, ln_ua, ln_c in points.tolist()
        ]
    times = transition.two_node_times_to_target(
        points, est.target_c, power_w, ambient_c, est.element_capacity_j_per_k
    )
    return [None if t != t else t for t in times.tolist()]


def sigma_root(cov: np.ndarray) -> np.ndarray:
    """Return the n columns whose ± make the 2n symmetric sigma points' offsets: √(n·cov)
    by Cholesky, or the eigen-decomposition with negative eigenvalues cut to zero when
    cov is not positive definite."""
    n = cov.shape[0]
    sym = 0.5 * (cov + cov.T)
    try:
        return np.linalg.cholesky(n * sym)
    except np.linalg.LinAlgError:
        w, v = np.linalg.eigh(sym)
        return v * np.sqrt(np.clip(w, 0.0, None) * n)


def sigma_points(mean: np.ndarray, cov: np.ndarray) -> np.ndarray:
    """Return the 2n sigma points about ``mean`` as rows: mean + r₀, mean - r₀, mean + r₁,
    ... with rₖ the columns of :func:`sigma_root`."""
    root = sigma_root(cov)
    points = np.empty((2 * len(mean), len(mean)))
    points[0::2] = (mean[:, None] + root).T
    points[1::2] = (mean[:, None] + -root).T
    return points


def sigma_spread(values: Iterable[float | None], centre: float) -> float | None:
    """Return the RMS of the values about ``centre`` (the unscented transform's standard
    deviation, equal weights), or None when any is None."""
    sq, count = 0.0, 0
    for value in values:
        if value is None:
            return None
        sq += (value - centre) ** 2
        count += 1
    return math.sqrt(sq / count)


def sigma_point_sd(
    f: Callable[[np.ndarray], float | None], cov: np.ndarray, centre: float
) -> float | None:
    """Return the unscented spread of f about ``centre``, or None where f fails at a point.

    f takes an offset d from the mean; the offsets are ± the columns of
    :func:`sigma_root`. Used for the time to target from a heat-up fit's parameters.
    """
    root = sigma_root(cov)
    offsets = ((root[:, k], -1.0 * root[:, k]) for k in range(cov.shape[0]))
    return sigma_spread((f(d) for pair in offsets for d in pair), centre)


def forecast_time_to_target(
    est: VesselEstimator, power_w: float, ambient_c: float
) -> TargetForecast:
    """Return the time to target (s) with a 90 % interval, from sigma points.

    The 2n symmetric sigma points x̄ ± √(n·P) columns (plus the mean) are pushed
    through the exact time-to-target (:func:`sigma_points`); the interval is the
    mean-point time ± 1.645 of their spread (the unscented transform's standard
    deviation) combined with a model-error allowance
    (``EstimatorSettings.forecast_model_error``). "Not reachable" when the mean point
    levels off below the target.
    """
    mean, cov = est.forecast_state()
    eta = _times_to_target(est, mean[None, :], power_w, ambient_c)[0]
    if eta is None:
        ua = math.exp(mean[-3] if est.layout.element is not None else mean[-2])
        level_c = ambient_c + power_w / ua
        reason = (
            f"not reachable: at {power_w:.0f} W the losses (UA {ua:.2f} W/K) hold the water "
            f"near {level_c:.1f} °C, below the {est.target_c:.2f} °C target"
        )
        return TargetForecast(est.target_c, None, None, None, reason)
    sd = sigma_spread(_times_to_target(est, sigma_points(mean, cov), power_w, ambient_c), eta)
    if sd is None:
        return TargetForecast(
            est.target_c, eta, None, None, "the interval reaches conditions that never get there"
        )
    parametric = sd * sd
    model_error = (est.settings.forecast_model_error * eta) ** 2
    spread = math.sqrt(parametric + model_error)
    return TargetForecast(est.target_c, eta, max(eta - Z_90 * spread, 0.0), eta + Z_90 * spread)

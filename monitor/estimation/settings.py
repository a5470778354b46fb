"""The filter's tuning (:class:`EstimatorSettings`) and what is known of a vessel before
its first reading (:class:`VesselConfig`, from a log's or a configuration's metadata)."""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass

from drivers.errors import ConfigError
from monitor.physics import water

#: χ² with one degree of freedom at 99.9 % (scipy.stats.chi2.ppf(0.999, 1)); the NIS test
#: on it is in Bar-Shalom, Li and Kirubarajan, Estimation with Applications to Tracking and
#: Navigation, ch. 5.
NIS_GATE_999 = 10.8276


@dataclass(frozen=True)
class EstimatorSettings:
    """Tuning of the filter. Random-walk rates are fractions per √s of the parameter."""

    water_noise_sd_c: float = 0.05  # reading noise of the water thermocouple, K
    element_noise_sd_c: float = 0.3  # reading noise of the element thermocouple, K
    water_process_sd_c: float = 0.002  # model error in T_w, K per √s
    element_process_sd_c: float = 0.3  # model error in T_e, K per √s
    ua_walk: float = 3.0e-4  # ln UA random walk, per √s (1.8 % an hour)
    capacity_walk: float = 1.0e-4  # ln C random walk, per √s (0.6 % an hour)
    conductance_walk: float = 1.0e-3  # ln G random walk, per √s
    ua_prior_w_per_k: float = 1.0
    ua_prior_ln_sd: float = 0.5
    capacity_prior_ln_sd: float = 0.7
    conductance_prior_ln_sd: float = 0.5
    water_sensor_tau_s: float | None = None  # None: take it from the log, else no lag
    element_sensor_tau_s: float | None = None  # likewise for the element thermocouple
    gate_nis: float = NIS_GATE_999
    # readings in a row more than huber_k sd's out before the sensor's temperatures are
    # widened (_reacquire)
    reacquire_after: int = 5
    stuck_after_s: float = 60.0
    plausible_c: tuple[float, float] = (-30.0, 400.0)
    heating_power_w: float = 20.0  # mean power above this counts as heating
    hold_band_k: float = 8.0  # holding: within this of the setpoint once reached
    dry_mass_kg: float = 0.1  # below this while boiling: dry-firing alarm
    forecast: bool = True
    # one node only: extra model error in T_w while the unmodelled element settles
    settle_after_switch_s: float = 40.0
    settle_water_sd_c: float = 0.05  # K per √s
    # 1σ model error of a time to target, as a fraction of it: the sigma points carry
    # only the parameters' uncertainty, not the model's own simplifications (the wall
    # and the element film are not what the lumped model says). 1.5 % was set so the
    # 90 % interval covers the simulated truth about 90 % of the time
    # (benchmarks/bench_estimator.py); revisit on real rig data.
    forecast_model_error: float = 0.015
    # batch fit: during the first heat-up the parameters come from a fit of the
    # two-node model with both sensor lags over the run so far (monitor.estimation.batchfit)
    batch_fit: bool = True
    # 1σ model error of the fit's time to target, as a fraction of it, beside the
    # fit's own spread (which carries the structural floor of monitor.estimation.batchfit)
    fit_forecast_model_error: float = 0.02
    # and an absolute 1σ, s: the last kelvins before the boil go faster than the lumped
    # model says (nucleate boiling at the element raises G), by about a second.
    # Both calibrated on benchmarks/bench_worlds.py (200 runs): with 1 % and 2 s the
    # 90 % interval covered 0.98 of the kettles' last three deciles (their errors
    # there a near-constant +1 s, the floor twice that) and 0.88 at 40 %
    fit_forecast_floor_s: float = 1.0
    # the lag of the vessel's parts other than the element (lid, wall) behind the water,
    # and its spread as a share of the correction (_unseen_vessel_capacity_j_per_k):
    # judgement (a lid of 40-200 J/K on a 0.5-3 W/K path lags 15-400 s), not measured
    # on a real kettle
    vessel_part_lag_s: float = 30.0
    # how long a heating power's deviation from its mean lasts (mains voltage wanders
    # over minutes; judgement, from memory): the fit's countdown blends the power now
    # and the heat-up's mean power by it (_fit_forecast)
    forecast_power_memory_s: float = 300.0
    vessel_part_lag_rel_sd: float = 0.6
    water_sensor_tau_prior_s: float = 2.5  # when the log does not give the lag
    element_sensor_tau_prior_s: float = 1.5
    # robust updates
    # Huber threshold, in innovation sd's: beyond it a reading gets weight k/|ν/√S|.
    # At 2.5 about 1 % of clean readings get a weight a little under one (P(|z| > 2.5)
    # = 1.2 % for a normal z, common practice, no source), while a reading 10 σ out
    # moves the state as a 2.5 σ one would. Measured on a kettle world noisier and
    # slower than the settings (16 seeds, power on time and one sample late, batch
    # fit off; the worst water-mass error at half the heat-up): k = 2.5 with the bound
    # below 3.2 %, k = 2 with a bound of 0.05 18 %; on 8 of the seeds, bound 0.05,
    # k = 1.5 gave 33 % and k = 3 3.5 %.
    huber_k: float = 2.5
    # beyond this many innovation sd's a reading is set aside entirely (an 8 K spike
    # of the water thermocouple is ~100 σ); it still counts towards the run that
    # widens the temperature uncertainty (reacquire_after)
    gross_error_sd: float = 30.0
    # the most one reading may move ln UA, ln C or ln G (3 %; a step has up to two
    # readings): a jump from 7 to 17 kJ/K, once made in one update, then needs 30
    # readings, each of which can disagree. On 8 seeds of the world above, k = 2:
    # 0.1 gave 52 %, 0.05 18 %, 0.03 1.3 %, 0.02 3.4 %; k = 2.5: 0.03 1.3 %, 0.02 2.2 %.
    max_param_step: float = 0.03
    # reading noise from idle readings (sensors.NoiseTracker): second differences kept
    noise_window: int = 600
    noise_min_count: int = 30  # differences before the estimate is used
    noise_settle_s: float = 120.0  # idle this long after a switch before counting
    noise_max_gap_s: float = 60.0  # a longer gap between readings breaks the chain
    # the element's path to the room, learnt while cooling (sensors.ElementPath): readings
    # from this long after the switch-off (a few of the element's C_e/G and the
    # sensors' lags), at least this many, before UA counts the path
    element_path_settle_s: float = 120.0
    element_path_min_readings: int = 30
    element_rest_min_readings: int = 5
    element_path_min_span_k: float = 10.0  # cooling's excess over the rest's, at least
    # the element thermocouple's zero from the rest before the first switch-on
    # (_zeroed): a rest this close to the room, a mismatch up to this (type K's
    # class 1 tolerance is ±1.5 K, from memory)
    element_zero_max_excess_k: float = 20.0
    element_zero_max_c: float = 1.5
    # 1σ of the element thermocouple's reading against the water's when no rest
    # reading measured it (two type K junctions: judgement, from memory), and the
    # floor on a measured one (the water and element are never quite equal at rest)
    element_mismatch_sd_c: float = 0.5
    element_rest_floor_sd_c: float = 0.03
    # 1σ of what the correction leaves out, as a share of it (calibrated below)
    element_path_model_rel_sd: float = 0.2
    # 1σ of what the lumped model leaves out of the filter's UA, as a share of it:
    # cooling, the wall and lid give back heat with lags of their own. On
    # benchmarks/bench_worlds.py (2026-12-05) the kettles without an element
    # thermocouple stated 1.2-1.7 % after 10 min of cooling for errors whose RMS
    # over the std was 1.8 (worst 6.5)
    ua_model_rel_sd: float = 0.02
    # a notice once a due heat-up fit has waited this long for the live service's
    # CPU budget (monitor.estimation.batchfit.FitBudget), s
    fit_wait_notice_s: float = 20.0


@dataclass(frozen=True)
class VesselConfig:
    """What the estimator needs to know of a vessel, from config or log metadata."""

    vessel: str
    vessel_heat_capacity_j_per_k: float = 0.0  # everything not water that follows it
    element_heat_capacity_j_per_k: float | None = None
    rated_power_w: float | None = None
    max_power_w: float | None = None  # above it a power reading is no reading
    nominal_volume_l: float | None = None
    target_c: float | None = None
    pressure_kpa: float = 101.325
    water_sensor_tau_s: float = 0.0
    element_sensor_tau_s: float = 0.0
    has_element_sensor: bool = False

    @classmethod
    def from_metadata(
        cls, vessel: str, meta: Mapping[str, object], has_element_sensor: bool
    ) -> VesselConfig:
        """Return the config described by a log's ``key: value`` metadata.

        Site pressure comes from ``pressure_kpa`` or else ``altitude_m`` (ICAO
        atmosphere), else 101.325 kPa. Raises ConfigError naming a bad key.
        """

        def number(key: str) -> float | None:
            value = meta.get(key)
            if value is None or value == "":
                return None
            try:
                out = float(value)  # type: ignore[arg-type]
            except (TypeError, ValueError):
                raise ConfigError(f"metadata {key!r} = {value!r} is not a number") from None
            if not math.isfinite(out):
                raise ConfigError(f"metadata {key!r} = {value!r} is not finite")
            return out

        pressure = number("pressure_kpa")
        altitude = number("altitude_m")
        if pressure is None:
            pressure = water.pressure_at_altitude_kpa(altitude) if altitude is not None else 101.325
        if not water.P_MIN_KPA <= pressure <= water.P_MAX_KPA:
            raise ConfigError(f"metadata 'pressure_kpa' = {pressure} is outside 1-500 kPa")
        vessel_c = number("vessel_heat_capacity_j_per_k") or 0.0
        if vessel_c < 0.0:
            raise ConfigError("metadata 'vessel_heat_capacity_j_per_k' is negative")
        return cls(
            vessel=vessel,
            vessel_heat_capacity_j_per_k=vessel_c,
            element_heat_capacity_j_per_k=number("element_heat_capacity_j_per_k"),
            rated_power_w=number("rated_power_w"),
            max_power_w=number("max_power_w"),
            nominal_volume_l=number("nominal_volume_l"),
            target_c=number("target_c"),
            pressure_kpa=pressure,
            water_sensor_tau_s=number("water_sensor_tau_s") or 0.0,
            element_sensor_tau_s=number("element_sensor_tau_s") or 0.0,
            has_element_sensor=has_element_sensor,
        )

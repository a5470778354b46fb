"""Time monitor.physics.water's fast path against iapws.IAPWS97 and measure its error; print JSON.

Run from the repository root:

    .venv/bin/python benchmarks/bench_water.py

The output is one JSON object:

- ``import_s``: a fresh interpreter's ``import monitor.physics.water`` (no tables built);
- ``first_call_s``: building every table (includes importing iapws);
- ``us_per_call``: microseconds per scalar call of each fast function and of the
  equivalent ``iapws.IAPWS97`` computation (best of several repeats, so the figure
  least disturbed by other load on the machine);
- ``ns_per_element_array``: the numpy path on a 10 000-element array;
- ``max_error_vs_if97``: worst-case error against IAPWS-IF97 (``iapws.IAPWS97``)
  over 1–100 °C and 50–110 kPa, liquid states only for the liquid properties.
  ``along_own_line`` compares with IF97 on the line the function follows (1-atm
  isobar, then saturated liquid): the interpolation error. ``at_t_and_p`` compares
  with IF97 at the actual (t, p): interpolation plus the ignored pressure
  dependence.
"""

from __future__ import annotations

import json
import subprocess
import sys
import time
import timeit
from collections.abc import Callable
from importlib.metadata import version

import numpy as np

from drivers.constants import KPA_PER_MPA, STANDARD_PRESSURE_KPA, ZERO_CELSIUS_K
from monitor.physics import water

T_GRID_C = np.round(np.arange(1.0, 100.0 + 1e-9, 0.05), 10)  # 1981 temperatures
P_GRID_KPA = np.arange(50.0, 110.0 + 1e-9, 2.5)  # 25 pressures
P_DENSE_KPA = np.round(np.arange(50.0, 110.0 + 1e-9, 0.02), 10)  # 3001 pressures
T_FULL_C = np.round(np.arange(0.0, 150.0 + 1e-9, 0.05), 10)  # the whole liquid range
P_FULL_KPA = np.round(np.arange(1.0, 500.0 + 1e-9, 0.1), 10)  # the whole pressure range
MIN_HEATING_STEP_K = 1.0  # heating energies are compared for ΔT of at least this


def _best_us(
    func: Callable[..., object], *args: object, number: int = 20000, repeat: int = 15
) -> float:
    """Return the best-of-``repeat`` time per call of ``func(*args)``, in µs."""
    # A statement string, not a lambda, so the figure holds only the call itself.
    names = [f"a{i}" for i in range(len(args))]
    timer = timeit.Timer(
        f"f({', '.join(names)})", globals={"f": func, **dict(zip(names, args, strict=True))}
    )
    return min(timer.repeat(repeat=repeat, number=number)) / number * 1e6


def _import_seconds() -> float:
    """Return the seconds a fresh interpreter spends on ``import monitor.physics.water``."""
    code = (
        "import time; t = time.perf_counter(); import monitor.physics.water; "
        "print(time.perf_counter() - t)"
    )
    out = subprocess.run(
        [sys.executable, "-c", code], check=True, capture_output=True, text=True
    ).stdout
    return float(out)


def _timings(iapws97: type) -> dict[str, dict[str, float | None]]:
    p_mpa = STANDARD_PRESSURE_KPA / KPA_PER_MPA
    t_k = 60.0 + ZERO_CELSIUS_K

    def latent_iapws(p: float) -> float:
        return iapws97(P=p, x=1).h - iapws97(P=p, x=0).h

    def heating_iapws(m: float, t0: float, t1: float) -> float:
        return m * (iapws97(T=t1, P=p_mpa).h - iapws97(T=t0, P=p_mpa).h)

    fast_and_slow = {
        "specific_heat_j_per_kg_k": (
            (water.specific_heat_j_per_kg_k, 60.0),
            (lambda t: iapws97(T=t, P=p_mpa).cp, t_k),
        ),
        "density_kg_per_m3": (
            (water.density_kg_per_m3, 60.0),
            (lambda t: iapws97(T=t, P=p_mpa).rho, t_k),
        ),
        "specific_enthalpy_j_per_kg": (
            (water.specific_enthalpy_j_per_kg, 60.0),
            (lambda t: iapws97(T=t, P=p_mpa).h, t_k),
        ),
        "heating_energy_j": (
            (water.heating_energy_j, 1.5, 15.0, 90.0),
            (heating_iapws, 1.5, 288.15, 363.15),
        ),
        "boiling_point_c": (
            (water.boiling_point_c, 90.0),
            (lambda p: iapws97(P=p, x=0).T, 0.09),
        ),
        "latent_heat_j_per_kg": (
            (water.latent_heat_j_per_kg, 90.0),
            (latent_iapws, 0.09),
        ),
        "pressure_at_altitude_kpa": ((water.pressure_at_altitude_kpa, 1234.0), None),
    }
    out: dict[str, dict[str, float | None]] = {}
    for name, (fast, slow) in fast_and_slow.items():
        fast_us = _best_us(fast[0], *fast[1:])
        slow_us = _best_us(slow[0], *slow[1:], number=200, repeat=5) if slow else None
        out[name] = {
            "fast": round(fast_us, 3),
            "iapws97": round(slow_us, 1) if slow_us is not None else None,
            "speedup": round(slow_us / fast_us) if slow_us is not None else None,
        }
    return out


def _array_timings() -> dict[str, float]:
    rng = np.random.default_rng(7)
    t = rng.uniform(1.0, 149.0, 10_000)
    p = rng.uniform(50.0, 110.0, 10_000)
    z = rng.uniform(0.0, 3000.0, 10_000)
    calls = {
        "specific_heat_j_per_kg_k": (water.specific_heat_j_per_kg_k, t),
        "density_kg_per_m3": (water.density_kg_per_m3, t),
        "specific_enthalpy_j_per_kg": (water.specific_enthalpy_j_per_kg, t),
        "boiling_point_c": (water.boiling_point_c, p),
        "latent_heat_j_per_kg": (water.latent_heat_j_per_kg, p),
        "pressure_at_altitude_kpa": (water.pressure_at_altitude_kpa, z),
    }
    return {
        name: round(_best_us(f, x, number=50, repeat=5) * 1e3 / x.size, 2)
        for name, (f, x) in calls.items()
    }


def _errors(iapws97: type) -> dict[str, object]:
    tb_c = water.boiling_point_c(STANDARD_PRESSURE_KPA)

    def line_state(t_c: float) -> object:
        # The state each liquid function follows: 1-atm isobar, then saturated liquid.
        if t_c <= tb_c:
            return iapws97(T=t_c + ZERO_CELSIUS_K, P=STANDARD_PRESSURE_KPA / KPA_PER_MPA)
        return iapws97(T=t_c + ZERO_CELSIUS_K, x=0)

    line = [line_state(t) for t in T_GRID_C]
    line_cp = np.array([s.cp for s in line]) * 1e3
    line_rho = np.array([s.rho for s in line])
    line_h = np.array([s.h for s in line]) * 1e3

    fast_cp = water.specific_heat_j_per_kg_k(T_GRID_C)
    fast_rho = water.density_kg_per_m3(T_GRID_C)
    fast_h = water.specific_enthalpy_j_per_kg(T_GRID_C)

    worst_cp = worst_rho = worst_h_abs = worst_h_rel = worst_q = 0.0
    for p_kpa in P_GRID_KPA:
        liquid = T_GRID_C + ZERO_CELSIUS_K < iapws97(P=p_kpa / KPA_PER_MPA, x=0).T
        t_c = T_GRID_C[liquid]
        states = [iapws97(T=t + ZERO_CELSIUS_K, P=p_kpa / KPA_PER_MPA) for t in t_c]
        assert all(s.region == 1 for s in states)
        cp = np.array([s.cp for s in states]) * 1e3
        rho = np.array([s.rho for s in states])
        h = np.array([s.h for s in states]) * 1e3
        worst_cp = max(worst_cp, np.max(np.abs(fast_cp[liquid] / cp - 1.0)))
        worst_rho = max(worst_rho, np.max(np.abs(fast_rho[liquid] / rho - 1.0)))
        worst_h_abs = max(worst_h_abs, np.max(np.abs(fast_h[liquid] - h)))
        worst_h_rel = max(worst_h_rel, np.max(np.abs(fast_h[liquid] / h - 1.0)))
        # Isobaric heating from every t_i to every t_j ≥ t_i + 1 K at this pressure.
        dq_ref = h[None, :] - h[:, None]
        dq_fast = fast_h[liquid][None, :] - fast_h[liquid][:, None]
        pairs = (t_c[None, :] - t_c[:, None]) >= MIN_HEATING_STEP_K
        worst_q = max(worst_q, np.max(np.abs(dq_fast[pairs] / dq_ref[pairs] - 1.0)))

    sat_liquid = [iapws97(P=p / KPA_PER_MPA, x=0) for p in P_DENSE_KPA]
    sat_vapour = [iapws97(P=p / KPA_PER_MPA, x=1) for p in P_DENSE_KPA]
    ts_ref = np.array([s.T for s in sat_liquid])
    hfg_ref = np.array([(v.h - f.h) * 1e3 for v, f in zip(sat_vapour, sat_liquid, strict=True)])
    ts_fast_k = water.boiling_point_c(P_DENSE_KPA) + ZERO_CELSIUS_K
    hfg_fast = water.latent_heat_j_per_kg(P_DENSE_KPA)

    return {
        "domain": "1-100 °C step 0.05 K x 50-110 kPa step 2.5 kPa (liquid states); "
        "saturation: 50-110 kPa step 0.02 kPa",
        "specific_heat_j_per_kg_k": {
            "along_own_line_rel": float(np.max(np.abs(fast_cp / line_cp - 1.0))),
            "at_t_and_p_rel": float(worst_cp),
        },
        "density_kg_per_m3": {
            "along_own_line_rel": float(np.max(np.abs(fast_rho / line_rho - 1.0))),
            "at_t_and_p_rel": float(worst_rho),
        },
        "specific_enthalpy_j_per_kg": {
            "along_own_line_abs_j_per_kg": float(np.max(np.abs(fast_h - line_h))),
            "along_own_line_rel": float(np.max(np.abs(fast_h / line_h - 1.0))),
            "at_t_and_p_abs_j_per_kg": float(worst_h_abs),
            "at_t_and_p_rel": float(worst_h_rel),
        },
        "heating_energy_j": {"at_t_and_p_rel_isobaric_dt_ge_1k": float(worst_q)},
        "boiling_point_c": {"rel_in_kelvin": float(np.max(np.abs(ts_fast_k / ts_ref - 1.0)))},
        "latent_heat_j_per_kg": {"rel": float(np.max(np.abs(hfg_fast / hfg_ref - 1.0)))},
    }


def _full_range_errors(iapws97: type) -> dict[str, object]:
    """Return the interpolation error along each function's own line over its whole range."""
    tb_c = water.boiling_point_c(STANDARD_PRESSURE_KPA)
    p_atm_mpa = STANDARD_PRESSURE_KPA / KPA_PER_MPA
    line = [
        iapws97(T=t + ZERO_CELSIUS_K, P=p_atm_mpa)
        if t <= tb_c
        else iapws97(T=t + ZERO_CELSIUS_K, x=0)
        for t in T_FULL_C
    ]
    sat_liquid = [iapws97(P=p / KPA_PER_MPA, x=0) for p in P_FULL_KPA]
    sat_vapour = [iapws97(P=p / KPA_PER_MPA, x=1) for p in P_FULL_KPA]
    hfg = np.array([(v.h - f.h) * 1e3 for v, f in zip(sat_vapour, sat_liquid, strict=True)])
    ts_k = np.array([s.T for s in sat_liquid])

    def rel(fast: np.ndarray, ref: np.ndarray) -> float:
        return float(np.max(np.abs(fast / ref - 1.0)))

    return {
        "domain": "liquid 0-150 °C step 0.05 K along its own line; saturation 1-500 kPa "
        "step 0.1 kPa",
        "specific_heat_j_per_kg_k_rel": rel(
            water.specific_heat_j_per_kg_k(T_FULL_C), np.array([s.cp for s in line]) * 1e3
        ),
        "density_kg_per_m3_rel": rel(
            water.density_kg_per_m3(T_FULL_C), np.array([s.rho for s in line])
        ),
        "specific_enthalpy_j_per_kg_abs_j_per_kg": float(
            np.max(
                np.abs(
                    water.specific_enthalpy_j_per_kg(T_FULL_C) - np.array([s.h for s in line]) * 1e3
                )
            )
        ),
        "boiling_point_c_rel_in_kelvin": rel(
            water.boiling_point_c(P_FULL_KPA) + ZERO_CELSIUS_K, ts_k
        ),
        "latent_heat_j_per_kg_rel": rel(water.latent_heat_j_per_kg(P_FULL_KPA), hfg),
    }


def main() -> None:
    """Print the benchmark's JSON object on stdout."""
    import_s = _import_seconds()
    start = time.perf_counter()
    water.build_tables()
    first_call_s = time.perf_counter() - start

    from iapws import IAPWS97  # after the build, so first_call_s includes this import

    result = {
        "python": sys.version.split()[0],
        "iapws": version("iapws"),
        "import_s": round(import_s, 3),
        "first_call_s": round(first_call_s, 3),
        "us_per_call": _timings(IAPWS97),
        "ns_per_element_array": _array_timings(),
        "max_error_vs_if97": _errors(IAPWS97),
        "max_error_vs_if97_full_range": _full_range_errors(IAPWS97),
    }
    print(json.dumps(result, indent=2, ensure_ascii=False))


if __name__ == "__main__":
    main()

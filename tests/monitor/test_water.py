"""Tests for monitor.physics.water against published figures and against iapws itself.

Sources are named beside each check value. IAPWS-95 figures (computed with the iapws
1.5.5 package) are not what IF97 gives, so those checks carry a tolerance sized from
the IF97-vs-IAPWS-95 difference, stated beside them; IF97's own verification tables
(IAPWS R7-97(2012)) are matched to their nine significant digits.
"""

from __future__ import annotations

import json
import subprocess
import sys
from collections.abc import Callable
from typing import NamedTuple

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from iapws import IAPWS97
from iapws.iapws97 import _PSat_T, _Region1, _Region2, _TSat_P

from drivers.constants import (
    ISA_EARTH_RADIUS_M,
    KPA_PER_MPA,
    PA_PER_KPA,
    STANDARD_PRESSURE_KPA,
    ZERO_CELSIUS_K,
)
from drivers.errors import PhysicsRangeError
from monitor.physics import water

P_ATM_MPA = STANDARD_PRESSURE_KPA / KPA_PER_MPA
LIQUID_FUNCTIONS = [
    water.specific_heat_j_per_kg_k,
    water.density_kg_per_m3,
    water.specific_enthalpy_j_per_kg,
]

# Bounds claimed in monitor/physics/water.py's docstring (measured there, rounded up here).
CLAIM_CP_LINE_REL = 2e-9
CLAIM_RHO_LINE_REL = 2e-10
CLAIM_H_LINE_ABS_J_PER_KG = 1e-4
CLAIM_HFG_REL = 2e-10
CLAIM_CP_TP_REL = 6.0e-5  # 5.9e-5 measured, all of it the ignored pressure dependence
CLAIM_RHO_TP_REL = 2.6e-5
CLAIM_H_TP_ABS_J_PER_KG = 53.0  # 52 measured
CLAIM_Q_TP_REL = 6.0e-5  # 5.8e-5 measured


@pytest.fixture(scope="module", autouse=True)
def _built_tables() -> None:
    # Build once up front, so no single test (or hypothesis example) pays for it.
    water.build_tables()


def _geometric_from_geopotential_m(h_m: float) -> float:
    # Inverse of H = r0·z/(r0 + z): z = r0·H/(r0 − H).
    return ISA_EARTH_RADIUS_M * h_m / (ISA_EARTH_RADIUS_M - h_m)


def _if97_on_line(t_c: float) -> IAPWS97:
    """IF97 state on the line the liquid functions follow: 1 atm, then saturated liquid."""
    if t_c <= water.boiling_point_c(STANDARD_PRESSURE_KPA):
        return IAPWS97(T=t_c + ZERO_CELSIUS_K, P=P_ATM_MPA)
    return IAPWS97(T=t_c + ZERO_CELSIUS_K, x=0)


class Grid(NamedTuple):
    """IF97 liquid properties on a (t, p) grid; NaN where the state is not liquid."""

    t_c: np.ndarray  # (nt,)
    p_kpa: np.ndarray  # (np,)
    cp: np.ndarray  # (np, nt), J/(kg·K)
    rho: np.ndarray  # kg/m³
    h: np.ndarray  # J/kg
    line_cp: np.ndarray  # (nt,) on the functions' own line
    line_rho: np.ndarray
    line_h: np.ndarray


@pytest.fixture(scope="module")
def grid() -> Grid:
    # 1–100 °C by 0.25 K and 50–110 kPa by 5 kPa: the working range the docstring
    # quotes, including its worst corner (1 °C, 50 kPa).
    t_c = np.round(np.arange(1.0, 100.0 + 1e-9, 0.25), 10)
    p_kpa = np.arange(50.0, 110.0 + 1e-9, 5.0)
    shape = (p_kpa.size, t_c.size)
    cp, rho, h = np.full(shape, np.nan), np.full(shape, np.nan), np.full(shape, np.nan)
    for i, p in enumerate(p_kpa):
        t_sat_k = IAPWS97(P=p / KPA_PER_MPA, x=0).T
        for j, t in enumerate(t_c):
            if t + ZERO_CELSIUS_K < t_sat_k:
                s = IAPWS97(T=t + ZERO_CELSIUS_K, P=p / KPA_PER_MPA)
                assert s.region == 1
                cp[i, j], rho[i, j], h[i, j] = s.cp * 1e3, s.rho, s.h * 1e3
    line = [_if97_on_line(t) for t in t_c]
    return Grid(
        t_c,
        p_kpa,
        cp,
        rho,
        h,
        np.array([s.cp for s in line]) * 1e3,
        np.array([s.rho for s in line]),
        np.array([s.h for s in line]) * 1e3,
    )


# --- IAPWS-IF97 verification values (IAPWS R7-97(2012)) ----------------------------------
# These check the iapws routines the tables are built from, and our own eq. 31.


@pytest.mark.parametrize(
    ("t_k", "p_mpa"),
    [
        # IAPWS R7-97(2012) Table 35
        (300.0, 0.353658941e-2),
        (500.0, 0.263889776e1),
        (600.0, 0.123443146e2),
    ],
)
def test_iapws_saturation_pressure_matches_if97_table_35(t_k: float, p_mpa: float) -> None:
    assert _PSat_T(t_k) == pytest.approx(p_mpa, rel=1e-8)


@pytest.mark.parametrize(
    ("p_mpa", "t_k"),
    [
        # IAPWS R7-97(2012) Table 36
        (0.1, 0.372755919e3),
        (1.0, 0.453035632e3),
        (10.0, 0.584149488e3),
    ],
)
def test_saturation_temperature_matches_if97_table_36(p_mpa: float, t_k: float) -> None:
    # Our written-out eq. 31 (beyond the public 500 kPa limit here) and iapws's.
    assert water._saturation_temperature_k(p_mpa) == pytest.approx(t_k, rel=1e-8)
    assert _TSat_P(p_mpa) == pytest.approx(t_k, rel=1e-8)


def test_boiling_point_at_100_kpa_matches_if97_table_36() -> None:
    # IAPWS R7-97(2012) Table 36: T_s(0.1 MPa) = 372.755919 K
    assert water.boiling_point_c(100.0) == pytest.approx(372.755919 - 273.15, abs=1e-6)


@pytest.mark.parametrize(
    ("t_k", "p_mpa", "v_m3_per_kg", "h_kj_per_kg", "cp_kj_per_kg_k"),
    [
        # IAPWS R7-97(2012) Table 5
        (300.0, 3.0, 0.100215168e-2, 0.115331273e3, 0.417301218e1),
        (300.0, 80.0, 0.971180894e-3, 0.184142828e3, 0.401008987e1),
        (500.0, 3.0, 0.120241800e-2, 0.975542239e3, 0.465580682e1),
    ],
)
def test_iapws_region_1_matches_if97_table_5(
    t_k: float, p_mpa: float, v_m3_per_kg: float, h_kj_per_kg: float, cp_kj_per_kg_k: float
) -> None:
    r = _Region1(t_k, p_mpa)
    assert r["v"] == pytest.approx(v_m3_per_kg, rel=1e-8)
    assert r["h"] == pytest.approx(h_kj_per_kg, rel=1e-8)
    assert r["cp"] == pytest.approx(cp_kj_per_kg_k, rel=1e-8)


@pytest.mark.parametrize("t_c", [0.5, 20.0, 60.0, 99.0, 120.0, 150.0])
def test_iapws_internals_agree_with_iapws97(t_c: float) -> None:
    # The tables use iapws's private region functions; they must give what the
    # public IAPWS97 class gives in our range.
    t_k = t_c + ZERO_CELSIUS_K
    p_s = _PSat_T(t_k)
    liquid, vapour = IAPWS97(T=t_k, x=0), IAPWS97(T=t_k, x=1)
    assert pytest.approx(p_s, rel=1e-12) == liquid.P
    assert _Region1(t_k, p_s)["h"] == pytest.approx(liquid.h, rel=1e-12)
    assert _Region2(t_k, p_s)["h"] == pytest.approx(vapour.h, rel=1e-12)
    if t_c < 99.0:
        r, s = _Region1(t_k, P_ATM_MPA), IAPWS97(T=t_k, P=P_ATM_MPA)
        assert (r["cp"], r["v"], r["h"]) == pytest.approx((s.cp, s.v, s.h), rel=1e-12)


# --- Water at 1 atm (IAPWS formulations, computed with iapws 1.5.5) -------------------


def test_normal_boiling_point() -> None:
    # 99.974 °C: IAPWS R7-97(2012) (IF97) T_s(0.101325 MPa), computed with iapws 1.5.5
    assert water.boiling_point_c(STANDARD_PRESSURE_KPA) == pytest.approx(99.974, abs=5e-4)


def test_latent_heat_at_one_atm() -> None:
    # 2256.54 kJ/kg, IAPWS R7-97(2012) (IF97) computed with iapws 1.5.5: ±0.005 rounding.
    assert water.latent_heat_j_per_kg(STANDARD_PRESSURE_KPA) == pytest.approx(2256.54e3, abs=5.0)
    # 2256.47 kJ/kg, IAPWS-95 as computed by iapws 1.5.5; IF97 is 0.07 kJ/kg (3e-5) above it.
    assert water.latent_heat_j_per_kg(STANDARD_PRESSURE_KPA) == pytest.approx(2256.47e3, rel=5e-5)


# IAPWS-95 liquid at 1 atm, as computed by the iapws 1.5.5 package.
# IF97 region 1 differs from IAPWS-95 along this isobar by up to 1.5e-5 in density and
# 5.3e-4 in c_p (at 60 °C), computed here with iapws 1.5.5 for both formulations;
# the tolerances are those differences plus the table's rounding.
IAPWS95_1ATM = [
    # t (°C), ρ (kg/m³), c_p (kJ/(kg·K))
    (4.0, 999.975, 4.2075),
    (10.0, 999.702, 4.1952),
    (20.0, 998.207, 4.1841),
    (25.0, 997.048, 4.1813),
    (40.0, 992.216, 4.1794),
    (60.0, 983.196, 4.1850),
    (80.0, 971.790, 4.1968),
    (90.0, 965.310, 4.2052),
]


@pytest.mark.parametrize(("t_c", "rho"), [(t, rho) for t, rho, _ in IAPWS95_1ATM])
def test_density_matches_iapws95_at_one_atm(t_c: float, rho: float) -> None:
    assert water.density_kg_per_m3(t_c) == pytest.approx(rho, rel=2e-5)


@pytest.mark.parametrize(("t_c", "cp_kj"), [(t, cp) for t, _, cp in IAPWS95_1ATM])
def test_specific_heat_matches_iapws95_at_one_atm(t_c: float, cp_kj: float) -> None:
    assert water.specific_heat_j_per_kg_k(t_c) == pytest.approx(cp_kj * 1e3, rel=6e-4)


def test_specific_heat_at_20_and_25_c_closely() -> None:
    # 4.1841 and 4.1813 kJ/(kg·K), IAPWS-95 as computed by iapws 1.5.5. IF97 is 1.7e-4 and 1.4e-4
    # above them (computed, iapws 1.5.5), so here a tighter 2.5e-4.
    assert water.specific_heat_j_per_kg_k(20.0) == pytest.approx(4184.1, rel=2.5e-4)
    assert water.specific_heat_j_per_kg_k(25.0) == pytest.approx(4181.3, rel=2.5e-4)
    # and c_p falls from 20 to 25 °C in both formulations
    assert water.specific_heat_j_per_kg_k(25.0) < water.specific_heat_j_per_kg_k(20.0)


def test_mean_specific_heat_is_the_enthalpy_rise_over_the_temperature_rise() -> None:
    # Consistency of our own functions (no outside value): the mean over 15-100 °C is
    # the integral of c_p, so it lies between c_p's extremes on the range and is the
    # trapezoid mean of c_p on a fine grid; over a tiny range it is c_p at the middle.
    mean = water.mean_specific_heat_j_per_kg_k(15.0, 100.0)
    grid = np.linspace(15.0, 100.0, 2001)
    cp = water.specific_heat_j_per_kg_k(grid)
    assert mean == pytest.approx(float(np.trapezoid(cp, grid)) / 85.0, rel=1e-6)
    assert float(cp.min()) < mean < float(cp.max())
    # at the end of a kettle's heat-up c_p itself is 0.7 % above the mean the fit saw
    assert water.specific_heat_j_per_kg_k(100.0) / mean - 1.0 == pytest.approx(0.0068, abs=0.001)
    assert water.mean_specific_heat_j_per_kg_k(40.0, 40.005) == pytest.approx(
        water.specific_heat_j_per_kg_k(40.0025), rel=1e-12
    )
    assert water.mean_specific_heat_j_per_kg_k(80.0, 20.0) == pytest.approx(
        water.mean_specific_heat_j_per_kg_k(20.0, 80.0), rel=1e-12
    )


def test_saturated_liquid_at_one_atm() -> None:
    # ρ 958.37 kg/m³ and c_p 4.2156 kJ/(kg·K), IAPWS-95 as computed by iapws 1.5.5.
    tb = water.boiling_point_c(STANDARD_PRESSURE_KPA)
    assert water.density_kg_per_m3(tb) == pytest.approx(958.37, rel=2e-5)
    assert water.specific_heat_j_per_kg_k(tb) == pytest.approx(4215.6, rel=6e-4)


def test_density_maximum_near_4_c() -> None:
    # 999.975 kg/m³ at 3.98 °C, IAPWS-95 as computed by iapws 1.5.5; IF97 puts it at 3.96 °C
    # (computed, iapws 1.5.5).
    t = np.linspace(2.0, 6.0, 4001)
    rho = water.density_kg_per_m3(t)
    assert t[np.argmax(rho)] == pytest.approx(3.98, abs=0.05)
    assert rho.max() == pytest.approx(999.975, rel=2e-6)


def test_heating_energy_from_15_c_to_boiling() -> None:
    # 355.98 kJ/kg from 15 °C to saturated liquid at 1 atm (and 335.05 kJ/kg from
    # 20 °C), IAPWS-95 as computed by iapws 1.5.5. IF97 gives 1.9e-4 and 2.2e-4 less (its c_p is
    # below IAPWS-95's over most of the range, see above), so 3e-4.
    tb = water.boiling_point_c(STANDARD_PRESSURE_KPA)
    assert water.heating_energy_j(1.0, 15.0, tb) == pytest.approx(355.98e3, rel=3e-4)
    assert water.heating_energy_j(1.0, 20.0, tb) == pytest.approx(335.05e3, rel=3e-4)
    assert water.heating_energy_j(1.7, 15.0, tb) == pytest.approx(1.7 * 355.98e3, rel=3e-4)


def test_heating_energy_agrees_with_m_c_delta_t() -> None:
    # Q = m·c·ΔT with c = 4.186 kJ/(kg·K) (common practice, no source): a 1.7 L
    # kettle fill from 15 to 95 °C.
    q = water.heating_energy_j(1.7, 15.0, 95.0)
    assert q == pytest.approx(1.7 * 4186.0 * 80.0, rel=5e-3)


def test_enthalpy_rise_is_the_integral_of_specific_heat() -> None:
    # (∂h/∂T)_p = c_p: along the 1-atm isobar the two tables must agree (Simpson's
    # rule on the c_p table, 1 kg, 10 → 95 °C).
    t = np.linspace(10.0, 95.0, 341)
    cp = water.specific_heat_j_per_kg_k(t)
    dt = t[1] - t[0]
    simpson = dt / 3.0 * (cp[0] + cp[-1] + 4.0 * cp[1:-1:2].sum() + 2.0 * cp[2:-1:2].sum())
    assert water.heating_energy_j(1.0, 10.0, 95.0) == pytest.approx(simpson, rel=1e-9)


def test_enthalpy_reference_state() -> None:
    # IF97: u = 0 and s = 0 for saturated liquid at the triple point (IAPWS
    # R7-97(2012)), so h = p·v = 611.657 Pa × 1.0002e-3 m³/kg ≈ 0.61 J/kg there (triple
    # point pressure and volume from memory). Compressing to 1 atm at 0.01 °C adds
    # (∂h/∂p)_T·Δp = v(1 − Tα)·Δp = 1.0002e-3 × (1 + 273.16 × 6.8e-5) × 100 713 Pa
    # ≈ 102.6 J/kg (α ≈ −6.8e-5 /K at 0 °C, from memory). Derived: ≈ 103.2 J/kg.
    assert water.specific_enthalpy_j_per_kg(0.01) == pytest.approx(103.2, abs=0.5)


# --- Standard atmosphere (ICAO Doc 7488 / ISO 2533) and boiling point at altitude --------


@pytest.mark.parametrize(
    ("h_geopotential_m", "p_pa"),
    [
        # computed from the ICAO Doc 7488 / ISO 2533 troposphere formula at geopotential H
        (0.0, 101325.0),
        (500.0, 95460.8),
        (1000.0, 89874.6),
        (1500.0, 84556.0),
        (2000.0, 79495.2),
        (3000.0, 70108.5),
        (4000.0, 61640.2),
        (5000.0, 54019.9),
        (8848.0, 31444.0),
    ],
)
def test_pressure_at_geopotential_altitude(h_geopotential_m: float, p_pa: float) -> None:
    z_m = _geometric_from_geopotential_m(h_geopotential_m)
    p_kpa = water.pressure_at_altitude_kpa(z_m)
    assert p_kpa * PA_PER_KPA == pytest.approx(p_pa, abs=0.06)  # table rounds to 0.1 Pa


@pytest.mark.parametrize(
    ("z_m", "p_pa"),
    [
        # At geometric height z, as computed by the PyPI `ambiance` 1.3.1 package
        # (ICAO Doc 7488, 1993).
        (500.0, 95461.3),
        (1000.0, 89876.3),
        (2000.0, 79501.4),
        (5000.0, 54048.3),
        (8848.0, 31501.3),
    ],
)
def test_pressure_at_geometric_altitude(z_m: float, p_pa: float) -> None:
    assert water.pressure_at_altitude_kpa(z_m) * PA_PER_KPA == pytest.approx(p_pa, abs=0.06)


def test_pressure_at_1000_m_matches_mathworks_atmosisa() -> None:
    # 1000 m geopotential → 8.9875e4 Pa, MathWorks atmosisa doc (R2021a).
    p_kpa = water.pressure_at_altitude_kpa(_geometric_from_geopotential_m(1000.0))
    assert p_kpa * PA_PER_KPA == pytest.approx(8.9875e4, abs=5.0)


def test_isa_pressure_exponent() -> None:
    # g0/(R·L) = 5.255880, computed by us from the ICAO Doc 7488 constants.
    assert pytest.approx(5.255880, abs=1e-6) == water._ISA_EXPONENT


@pytest.mark.parametrize(
    ("h_geopotential_m", "t_b_2dp", "t_b_iapws95", "h_fg_kj_iapws95"),
    [
        # At the ICAO Doc 7488 / ISO 2533 pressure p(H): T_b to 2 decimals from IAPWS
        # R7-97(2012) (IF97), then T_b and h_fg from IAPWS-95, all computed.
        (1000.0, 96.65, 96.649, 2265.22),
        (2000.0, 93.32, 93.315, 2273.91),
        (5000.0, 83.25, 83.255, 2299.76),
    ],
)
def test_boiling_point_at_altitude(
    h_geopotential_m: float, t_b_2dp: float, t_b_iapws95: float, h_fg_kj_iapws95: float
) -> None:
    p_kpa = water.pressure_at_altitude_kpa(_geometric_from_geopotential_m(h_geopotential_m))
    t_b = water.boiling_point_c(p_kpa)
    assert t_b == pytest.approx(t_b_2dp, abs=0.005 + 1e-9)
    # IF97's T_s is within 0.3 mK of IAPWS-95's here (computed); 0.5 mK of rounding.
    assert t_b == pytest.approx(t_b_iapws95, abs=1e-3)
    # IF97's h_fg is 0.06–0.07 kJ/kg (≤ 3.1e-5) above IAPWS-95's here (computed).
    assert water.latent_heat_j_per_kg(p_kpa) == pytest.approx(h_fg_kj_iapws95 * 1e3, rel=5e-5)


def test_boiling_point_falls_about_3_3_k_per_1000_m() -> None:
    # Roughly 3.3 K lower per 1000 m near sea level: our reading of the ICAO atmosphere
    # with IF97 boiling points (computed), not a published figure.
    drop = water.boiling_point_c(water.pressure_at_altitude_kpa(0.0)) - water.boiling_point_c(
        water.pressure_at_altitude_kpa(1000.0)
    )
    assert drop == pytest.approx(3.3, abs=0.05)


# --- The pressure dependence the liquid functions ignore ------------------------------


def test_pressure_dependence_over_50_to_110_kpa_is_as_documented(grid: Grid) -> None:
    # IF97 at (t, p) against IF97 on the functions' own line, over 1–100 °C and
    # 50–110 kPa; the docstring's figures must be right, not merely upper bounds.
    cp_rel = np.nanmax(np.abs(grid.cp / grid.line_cp - 1.0))
    rho_rel = np.nanmax(np.abs(grid.rho / grid.line_rho - 1.0))
    h_abs = np.nanmax(np.abs(grid.h - grid.line_h))
    assert 5.8e-5 < cp_rel <= 5.9e-5
    assert 2.5e-5 < rho_rel <= 2.6e-5
    assert 51.0 < h_abs <= 53.0


# --- The fast path against iapws -------------------------------------------------------


def test_liquid_functions_within_claimed_error_at_t_and_p(grid: Grid) -> None:
    liquid = ~np.isnan(grid.cp)
    t = np.broadcast_to(grid.t_c, grid.cp.shape)[liquid]
    assert np.max(np.abs(water.specific_heat_j_per_kg_k(t) / grid.cp[liquid] - 1.0)) <= (
        CLAIM_CP_TP_REL
    )
    assert np.max(np.abs(water.density_kg_per_m3(t) / grid.rho[liquid] - 1.0)) <= (CLAIM_RHO_TP_REL)
    assert np.max(np.abs(water.specific_enthalpy_j_per_kg(t) - grid.h[liquid])) <= (
        CLAIM_H_TP_ABS_J_PER_KG
    )


def test_heating_energy_within_claimed_error_at_any_pressure(grid: Grid) -> None:
    # Isobaric heating from every grid t_i to every t_j ≥ t_i + 1 K, at each pressure.
    h_fast = water.specific_enthalpy_j_per_kg(grid.t_c)
    worst = 0.0
    for h_row in grid.h:
        ok = ~np.isnan(h_row)
        t, h_ref, h_ours = grid.t_c[ok], h_row[ok], h_fast[ok]
        pairs = (t[None, :] - t[:, None]) >= 1.0
        q_ref = (h_ref[None, :] - h_ref[:, None])[pairs]
        q_ours = (h_ours[None, :] - h_ours[:, None])[pairs]
        worst = max(worst, float(np.max(np.abs(q_ours / q_ref - 1.0))))
    assert 1e-5 < worst <= CLAIM_Q_TP_REL


def test_liquid_functions_within_claimed_interpolation_error_on_their_line() -> None:
    # Every 0.05 K over the whole range, so points fall all across each 1 K interval
    # (linear interpolation would miss c_p by ~1e-5 here).
    t = np.round(np.arange(0.0, 150.0 + 1e-9, 0.05), 10)
    line = [_if97_on_line(x) for x in t]
    cp = np.array([s.cp for s in line]) * 1e3
    rho = np.array([s.rho for s in line])
    h = np.array([s.h for s in line]) * 1e3
    assert np.max(np.abs(water.specific_heat_j_per_kg_k(t) / cp - 1.0)) <= CLAIM_CP_LINE_REL
    assert np.max(np.abs(water.density_kg_per_m3(t) / rho - 1.0)) <= CLAIM_RHO_LINE_REL
    assert np.max(np.abs(water.specific_enthalpy_j_per_kg(t) - h)) <= CLAIM_H_LINE_ABS_J_PER_KG


def test_scalar_calls_match_iapws97_at_range_ends() -> None:
    for t_c in (0.0, 150.0):
        s = _if97_on_line(t_c)
        assert water.specific_heat_j_per_kg_k(t_c) == pytest.approx(s.cp * 1e3, rel=1e-9)
        assert water.density_kg_per_m3(t_c) == pytest.approx(s.rho, rel=1e-10)
        assert water.specific_enthalpy_j_per_kg(t_c) == pytest.approx(s.h * 1e3, abs=1e-4)
    for p_kpa in (1.0, 500.0):
        f, g = IAPWS97(P=p_kpa / KPA_PER_MPA, x=0), IAPWS97(P=p_kpa / KPA_PER_MPA, x=1)
        assert water.latent_heat_j_per_kg(p_kpa) == pytest.approx((g.h - f.h) * 1e3, rel=1e-10)
        assert water.boiling_point_c(p_kpa) + ZERO_CELSIUS_K == pytest.approx(f.T, rel=1e-14)


def test_saturation_functions_match_iapws97_over_their_range() -> None:
    p_kpa = np.round(np.arange(1.0, 500.0 + 1e-9, 0.25), 10)
    liquid = [IAPWS97(P=p / KPA_PER_MPA, x=0) for p in p_kpa]
    vapour = [IAPWS97(P=p / KPA_PER_MPA, x=1) for p in p_kpa]
    t_s_k = np.array([s.T for s in liquid])
    h_fg = np.array([(g.h - f.h) * 1e3 for f, g in zip(liquid, vapour, strict=True)])
    t_ours_k = water.boiling_point_c(p_kpa) + ZERO_CELSIUS_K
    assert np.max(np.abs(t_ours_k / t_s_k - 1.0)) <= 1e-14
    assert np.max(np.abs(water.latent_heat_j_per_kg(p_kpa) / h_fg - 1.0)) <= CLAIM_HFG_REL


def test_liquid_functions_are_continuous_at_the_normal_boiling_point() -> None:
    tb = water.boiling_point_c(STANDARD_PRESSURE_KPA)
    for f in LIQUID_FUNCTIONS:
        below, above = f(float(np.nextafter(tb, 0.0))), f(float(np.nextafter(tb, 200.0)))
        assert below == pytest.approx(above, rel=1e-12)
        assert f(tb) == pytest.approx(below, rel=1e-12)


# --- Numpy arrays ------------------------------------------------------------------


SCALAR_AND_ARRAY_CASES: list[tuple[Callable[..., object], np.ndarray]] = [
    (water.specific_heat_j_per_kg_k, np.linspace(0.0, 150.0, 1001)),
    (water.density_kg_per_m3, np.linspace(0.0, 150.0, 1001)),
    (water.specific_enthalpy_j_per_kg, np.linspace(0.0, 150.0, 1001)),
    (water.boiling_point_c, np.linspace(1.0, 500.0, 1001)),
    (water.latent_heat_j_per_kg, np.linspace(1.0, 500.0, 1001)),
    (water.pressure_at_altitude_kpa, np.linspace(-500.0, 11000.0, 1001)),
]


@pytest.mark.parametrize(("func", "x"), SCALAR_AND_ARRAY_CASES)
def test_array_path_matches_scalar_path(func: Callable[..., object], x: np.ndarray) -> None:
    from_array = func(x)
    from_scalars = np.array([func(float(v)) for v in x])
    assert isinstance(from_array, np.ndarray)
    assert from_array.shape == x.shape
    np.testing.assert_allclose(from_array, from_scalars, rtol=1e-14, atol=0.0)


@pytest.mark.parametrize(("func", "x"), SCALAR_AND_ARRAY_CASES)
def test_array_path_keeps_shape(func: Callable[..., object], x: np.ndarray) -> None:
    square = x[:1000].reshape(25, 40)
    out = func(square)
    assert out.shape == (25, 40)
    np.testing.assert_allclose(out.ravel(), func(square.ravel()), rtol=1e-15, atol=0.0)
    assert func(np.asarray(x[3])).shape == ()


def test_scalar_call_returns_a_float() -> None:
    assert type(water.specific_heat_j_per_kg_k(20.0)) is float
    assert type(water.latent_heat_j_per_kg(90.0)) is float
    assert type(water.boiling_point_c(90.0)) is float


def test_heating_energy_broadcasts_over_arrays() -> None:
    masses = np.array([0.5, 1.0, 2.0])
    ends = np.array([40.0, 60.0, 90.0])
    q = water.heating_energy_j(masses, np.full(3, 20.0), ends)
    expected = [
        water.heating_energy_j(float(m), 20.0, float(e)) for m, e in zip(masses, ends, strict=True)
    ]
    np.testing.assert_allclose(q, expected, rtol=1e-14)


def test_tables_are_read_only() -> None:
    table = water._liquid_tables().cp
    assert not table.rows.flags.writeable
    with pytest.raises(ValueError, match="read-only"):
        table.rows[0, 0] = 0.0
    assert water._liquid_tables() is water._liquid_tables()  # built once


def test_import_does_not_load_iapws() -> None:
    code = "import sys, monitor.physics.water; print('iapws' in sys.modules)"
    out = subprocess.run(
        [sys.executable, "-c", code], check=True, capture_output=True, text=True
    ).stdout
    assert out.strip() == "False"


# --- Properties (hypothesis) ---------------------------------------------------------

temperatures = st.floats(min_value=0.0, max_value=150.0)


@settings(deadline=None, max_examples=200)
@given(a=temperatures, b=temperatures, c=temperatures, m=st.floats(0.0, 500.0))
def test_heating_energy_adds_up_and_reverses(a: float, b: float, c: float, m: float) -> None:
    q_ab = water.heating_energy_j(m, a, b)
    assert water.heating_energy_j(m, b, a) == -q_ab
    # Going a → b → c is going a → c (to the rounding of h ≈ 6e5 J/kg).
    assert q_ab + water.heating_energy_j(m, b, c) == pytest.approx(
        water.heating_energy_j(m, a, c), abs=1e-7 * m + 1e-12
    )


@settings(deadline=None, max_examples=200)
@given(t=st.floats(0.0, 149.99), dt=st.floats(1e-6, 10.0))
def test_enthalpy_rises_with_temperature(t: float, dt: float) -> None:
    t2 = min(t + dt, 150.0)
    assert water.specific_enthalpy_j_per_kg(t2) > water.specific_enthalpy_j_per_kg(t)


@settings(deadline=None, max_examples=200)
@given(t=st.floats(4.1, 149.99), dt=st.floats(1e-4, 10.0))
def test_density_falls_with_temperature_above_4_c(t: float, dt: float) -> None:
    # Above the density maximum (≈ 4 °C, IAPWS-95 via iapws 1.5.5) water expands on heating.
    t2 = min(t + dt, 150.0)
    assert water.density_kg_per_m3(t2) < water.density_kg_per_m3(t)


@settings(deadline=None, max_examples=200)
@given(p=st.floats(1.0, 499.0), dp=st.floats(1e-6, 50.0))
def test_boiling_point_and_latent_heat_move_with_pressure(p: float, dp: float) -> None:
    p2 = min(p + dp, 500.0)
    assert water.boiling_point_c(p2) > water.boiling_point_c(p)
    assert water.latent_heat_j_per_kg(p2) < water.latent_heat_j_per_kg(p)


@settings(deadline=None, max_examples=200)
@given(z=st.floats(-500.0, 10999.0), dz=st.floats(1e-3, 1000.0))
def test_pressure_falls_with_altitude(z: float, dz: float) -> None:
    z2 = min(z + dz, 11000.0)
    assert water.pressure_at_altitude_kpa(z2) < water.pressure_at_altitude_kpa(z)


# --- Range errors ------------------------------------------------------------------


@pytest.mark.parametrize("func", LIQUID_FUNCTIONS)
@pytest.mark.parametrize("t_c", [-0.01, 150.01, -40.0, 1e6, float("nan"), float("inf")])
def test_liquid_functions_reject_temperatures_out_of_range(
    func: Callable[[float], float], t_c: float
) -> None:
    with pytest.raises(PhysicsRangeError, match="t_c"):
        func(t_c)
    with pytest.raises(PhysicsRangeError, match="t_c"):
        func(np.array([20.0, t_c, 30.0]))


@pytest.mark.parametrize("func", [water.boiling_point_c, water.latent_heat_j_per_kg])
@pytest.mark.parametrize("p_kpa", [0.99, 500.01, 0.0, -101.325, float("nan")])
def test_saturation_functions_reject_pressures_out_of_range(
    func: Callable[[float], float], p_kpa: float
) -> None:
    with pytest.raises(PhysicsRangeError, match="pressure_kpa"):
        func(p_kpa)
    with pytest.raises(PhysicsRangeError, match="pressure_kpa"):
        func(np.array([p_kpa, 100.0]))


@pytest.mark.parametrize("z_m", [-500.01, 11000.01, 20000.0, float("nan")])
def test_altitude_out_of_range(z_m: float) -> None:
    with pytest.raises(PhysicsRangeError, match="altitude_m"):
        water.pressure_at_altitude_kpa(z_m)
    with pytest.raises(PhysicsRangeError, match="altitude_m"):
        water.pressure_at_altitude_kpa(np.array([0.0, z_m]))


@pytest.mark.parametrize("mass_kg", [-1e-9, -1.0, float("nan"), float("inf")])
def test_heating_energy_rejects_bad_mass(mass_kg: float) -> None:
    with pytest.raises(PhysicsRangeError, match="mass_kg"):
        water.heating_energy_j(mass_kg, 20.0, 90.0)
    with pytest.raises(PhysicsRangeError, match="mass_kg"):
        water.heating_energy_j(np.array([1.0, mass_kg]), np.full(2, 20.0), np.full(2, 90.0))


def test_heating_energy_rejects_a_temperature_out_of_range() -> None:
    with pytest.raises(PhysicsRangeError, match="t_c"):
        water.heating_energy_j(1.0, 20.0, 160.0)


def test_range_error_is_a_value_error_and_says_the_range() -> None:
    with pytest.raises(ValueError, match=r"0\.\.150 °C"):
        water.density_kg_per_m3(151.0)


def test_range_ends_are_accepted() -> None:
    for f in LIQUID_FUNCTIONS:
        assert f(water.T_MIN_C) > 0.0
        assert f(water.T_MAX_C) > 0.0
    # T_s(1 kPa) = 6.97 °C and T_s(500 kPa) = 151.83 °C (steam tables, from memory).
    assert water.boiling_point_c(water.P_MIN_KPA) == pytest.approx(6.97, abs=0.01)
    assert water.boiling_point_c(water.P_MAX_KPA) == pytest.approx(151.83, abs=0.01)
    assert water.latent_heat_j_per_kg(water.P_MIN_KPA) > water.latent_heat_j_per_kg(500.0)
    assert water.pressure_at_altitude_kpa(water.ALTITUDE_MIN_M) > STANDARD_PRESSURE_KPA
    # Just above the 22.632 kPa of the 11 000 m geopotential layer base (ICAO Doc 7488),
    # since 11 000 m geometric is 10 981 m geopotential.
    assert 22.632 < water.pressure_at_altitude_kpa(water.ALTITUDE_MAX_M) < 22.8
    assert water.heating_energy_j(0.0, 20.0, 90.0) == 0.0


def test_shipped_tables_are_a_fresh_build_bit_for_bit() -> None:
    # water_tables.json is what scripts/water_tables.py writes; a change to how the
    # tables are built (or an iapws that computes IF97 differently) shows here
    shipped = json.loads(water.TABLES_PATH.read_text(encoding="utf-8"))
    assert shipped == water.tables_document()


def test_a_property_call_reads_the_shipped_tables_without_iapws() -> None:
    code = (
        "import sys, monitor.physics.water as w; w.specific_heat_j_per_kg_k(50.0);"
        " w.latent_heat_j_per_kg(101.325); print('iapws' in sys.modules)"
    )
    out = subprocess.run(
        [sys.executable, "-c", code], check=True, capture_output=True, text=True
    ).stdout
    assert out.strip() == "False"


def test_tables_are_built_from_if97_when_the_file_is_missing(monkeypatch, caplog) -> None:
    # the same pieces either way: built afresh they equal the shipped ones exactly
    shipped_cp = water._liquid_tables().cp.rows.copy()
    shipped_latent = water._latent_table().rows.copy()
    monkeypatch.setattr(water, "TABLES_PATH", water.TABLES_PATH.with_name("no-such.json"))
    for cached in (water._shipped_tables, water._liquid_tables, water._latent_table):
        cached.cache_clear()
    try:
        with caplog.at_level("WARNING"):
            assert np.array_equal(water._liquid_tables().cp.rows, shipped_cp)
            assert np.array_equal(water._latent_table().rows, shipped_latent)
        assert "building them from IF97" in caplog.text
    finally:
        for cached in (water._shipped_tables, water._liquid_tables, water._latent_table):
            cached.cache_clear()

"""Water and steam properties for the heat balance, fast enough for a filter's inner loop.

Every figure comes from IAPWS-IF97 (IAPWS R7-97(2012)) as implemented by the
``iapws`` library, but the library is only called to *build* tables of cubic
pieces. A scalar call then costs 0.4–0.5 µs instead of the ~140 µs of
``iapws.IAPWS97`` (Python 3.11, measured by ``benchmarks/bench_water.py``). The
tables ship with the code (``water_tables.json``, written by
``scripts/water_tables.py``; a test checks them against a fresh build, bit for bit),
so the figures do not hang on the installed iapws version, and a process reads
them in milliseconds at the first property call. Importing iapws (it pulls in
scipy, 50 MiB) and building would take about 0.5 s: that happens only if the
file is missing or unreadable (with a warning) or from :func:`tables_document`.

What each function follows
--------------------------
Liquid properties are functions of temperature alone. Up to the normal boiling
point t_b = 99.9743 °C (IF97 T_s at 101.325 kPa) they are taken along the
101.325 kPa isobar; from t_b to 150 °C along the saturated-liquid line, whose
pressure p_s(t) rises from 101.3 kPa at t_b to 476 kPa at 150 °C. The two lines
meet at t_b, so each property is continuous there (its slope has a small kink).
The pressure dependence this ignores is small over 50–110 kPa (IF97, worst case
over 1–100 °C at liquid states): c_p moves by 5.9e-5 relative (at 1 °C and
50 kPa), density by 2.6e-5 relative, and enthalpy by 52 J/kg (≈ v·Δp, nearly the
same offset at every temperature, so it almost cancels in an isobaric heating
energy: 5.8e-5 relative).

Saturation properties are functions of pressure. :func:`boiling_point_c` is the
IF97 region-4 backward equation T_s(p) (eq. 31) written out: exact IF97, no table.
:func:`latent_heat_j_per_kg` is h_fg = h'' − h' (IF97 regions 2 and 1 at
saturation), tabulated against x = p^(1/4), the variable eq. 31 is built on, in
which h_fg is smooth over the whole range.

The fast path
-------------
Piecewise cubic Hermite interpolation on uniform grids. Each node holds the IF97
value and slope (a central difference of IF97 with a step of 1/1000 of the grid
step); each interval's cubic is stored as four Horner coefficients in a tuple of
tuples. A scalar call is a range check, a multiply, an ``int()``, a tuple lookup
and three multiply-adds, all in plain Python floats (faster than numpy for one
value). A numpy array goes through the same cubics vectorised (about 50 ns per
element) and gives the same results as scalar calls.

- c_p, density, enthalpy: 0 °C to t_b in 100 intervals (1.0 K) and t_b to 150 °C
  in 50 intervals (1.0 K); t_b is a node, so no cubic spans the kink.
- h_fg: x = p^(1/4) from 1 to 500^(1/4) = 4.729 (p in kPa) in 150 intervals.

Worst-case error against IAPWS-IF97 (``iapws.IAPWS97``), measured by
``benchmarks/bench_water.py`` over 1–100 °C (0.05 K steps) and 50–110 kPa,
liquid states only; ``tests/monitor/test_water.py`` asserts bounds just above
these:

==========================  ==============================  ============================
function                    vs IF97 on its own line         vs IF97 at the actual (t, p)
                            (interpolation only)            (adds the pressure effect)
==========================  ==============================  ============================
specific_heat_j_per_kg_k    1.6e-9 relative                 5.9e-5 relative
density_kg_per_m3           9.4e-11 relative                2.6e-5 relative
specific_enthalpy_j_per_kg  6.8e-5 J/kg (1.1e-8 relative)   52 J/kg (1.2e-2 relative at
                                                            1 °C, where h is only 4 kJ/kg)
heating_energy_j            as enthalpy                     5.8e-5 relative (isobaric,
                                                            ΔT ≥ 1 K)
boiling_point_c             1.1e-15 relative in K (eq. 31   —
                            itself; rounding only)
latent_heat_j_per_kg        3.8e-12 relative                —
==========================  ==============================  ============================

Over the whole tabulated ranges (0–150 °C, 1–500 kPa) the interpolation errors
are 1.8e-9 (c_p), 1.0e-10 (density), 7.5e-5 J/kg (enthalpy) and 1.7e-10 (h_fg).

Ranges (outside them, or for NaN, a :class:`~drivers.errors.PhysicsRangeError`):
temperature 0–150 °C (IF97 region 1 starts at 273.15 K; 150 °C covers a closed
vessel at 4.8 bar); pressure 1–500 kPa (T_s 7.0–151.8 °C); altitude −500 m to
11 000 m geometric (inside the ICAO troposphere, which ends at 11 000 m
geopotential, ≈ 11 019 m geometric).
"""

from __future__ import annotations

import functools
import json
import logging
import math
from collections.abc import Callable
from pathlib import Path
from typing import NamedTuple, TypeVar

import numpy as np
import numpy.typing as npt

from drivers.constants import (
    ISA_AIR_GAS_CONSTANT_J_PER_KG_K,
    ISA_EARTH_RADIUS_M,
    ISA_LAPSE_RATE_K_PER_M,
    ISA_SEA_LEVEL_PRESSURE_PA,
    ISA_SEA_LEVEL_TEMPERATURE_K,
    J_PER_KJ,
    KPA_PER_MPA,
    PA_PER_KPA,
    STANDARD_GRAVITY_M_PER_S2,
    STANDARD_PRESSURE_KPA,
    ZERO_CELSIUS_K,
)
from drivers.errors import PhysicsRangeError

__all__ = [
    "ALTITUDE_MAX_M",
    "ALTITUDE_MIN_M",
    "P_MAX_KPA",
    "P_MIN_KPA",
    "TABLES_PATH",
    "T_MAX_C",
    "T_MIN_C",
    "boiling_point_c",
    "build_tables",
    "density_kg_per_m3",
    "heating_energy_j",
    "latent_heat_j_per_kg",
    "pressure_at_altitude_kpa",
    "specific_enthalpy_j_per_kg",
    "specific_heat_j_per_kg_k",
    "tables_document",
]

_log = logging.getLogger(__name__)

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.intp]
# A float in gives a float out; a numpy array in gives an array of the same shape out.
FloatOrArray = TypeVar("FloatOrArray", float, FloatArray)

# --- Ranges ----------------------------------------------------------------------

T_MIN_C = 0.0  # lower end of the liquid tables, °C (IF97 region 1 starts at 273.15 K)
T_MAX_C = 150.0  # upper end of the liquid tables, °C (on the saturated-liquid line)
P_MIN_KPA = 1.0  # lower end for saturation properties, kPa (T_s ≈ 6.97 °C)
P_MAX_KPA = 500.0  # upper end for saturation properties, kPa (T_s ≈ 151.83 °C)
ALTITUDE_MIN_M = -500.0  # geometric, m (below the Dead Sea shore, ≈ −430 m, from memory)
ALTITUDE_MAX_M = 11000.0  # geometric, m (inside the ICAO troposphere)

# --- IF97 region 4 (saturation line) ---------------------------------------------------

# Coefficients n1…n10 of the IF97 saturation equations 30 and 31: IAPWS R7-97(2012)
# Table 34 (the table number from memory). They are
# equation coefficients, not physical constants, so they live beside the equation
# rather than in drivers.constants.
_N1, _N2, _N3, _N4, _N5, _N6, _N7, _N8, _N9, _N10 = (
    0.11670521452767e4,
    -0.72421316703206e6,
    -0.17073846940092e2,
    0.12020824702470e5,
    -0.32325550322333e7,
    0.14915108613530e2,
    -0.48232657361591e4,
    0.40511340542057e6,
    -0.23855557567849,
    0.65017534844798e3,
)


def _saturation_temperature_k(p_mpa: FloatOrArray) -> FloatOrArray:
    """Return IF97 T_s(p) in K for p in MPa: the region-4 backward equation, eq. 31."""
    # β = p^(1/4); E, F, G are quadratics in β; D solves the quadratic in ϑ.
    beta = p_mpa**0.25
    beta2 = beta * beta
    e = beta2 + _N3 * beta + _N6
    f = _N1 * beta2 + _N4 * beta + _N7
    g = _N2 * beta2 + _N5 * beta + _N8
    d = 2.0 * g / (-f - (f * f - 4.0 * e * g) ** 0.5)
    # T_s = (n10 + D − √((n10 + D)² − 4(n9 + n10·D))) / 2
    n10_d = _N10 + d
    return 0.5 * (n10_d - (n10_d * n10_d - 4.0 * (_N9 + _N10 * d)) ** 0.5)


_MPA_PER_KPA = 1.0 / KPA_PER_MPA

# Normal boiling point, °C: IF97 T_s at 101.325 kPa (99.9743 °C). Where the liquid
# tables switch from the 1-atm isobar to the saturated-liquid line.
_NORMAL_BOILING_POINT_C = (
    _saturation_temperature_k(STANDARD_PRESSURE_KPA * _MPA_PER_KPA) - ZERO_CELSIUS_K
)

# --- ICAO standard atmosphere ----------------------------------------------------------

_ISA_P0_KPA = ISA_SEA_LEVEL_PRESSURE_PA / PA_PER_KPA
# Exponent g0/(R·L) of the troposphere pressure law, 5.25588 (dimensionless).
_ISA_EXPONENT = STANDARD_GRAVITY_M_PER_S2 / (
    ISA_AIR_GAS_CONSTANT_J_PER_KG_K * ISA_LAPSE_RATE_K_PER_M
)
# L/T0, 1/m: p = p0·(1 − (L/T0)·H)^(g0/(R·L)).
_ISA_L_OVER_T0_PER_M = ISA_LAPSE_RATE_K_PER_M / ISA_SEA_LEVEL_TEMPERATURE_K

# --- Tables ------------------------------------------------------------------------

# Grid sizes (intervals) and the step of the central differences that give node slopes.
_N_LIQUID_BELOW_TB = 100
_N_LIQUID_ABOVE_TB = 50
_N_LATENT = 150
_SLOPE_STEP_FRACTION = 1e-3  # central-difference step, as a fraction of the grid step
#: The grid the tables are built on, written in the shipped file: a file for another grid
#: is not used.
_TABLE_GRID = [_N_LIQUID_BELOW_TB, _N_LIQUID_ABOVE_TB, _N_LATENT, _SLOPE_STEP_FRACTION]


class _Segment(NamedTuple):
    """Cubic Hermite pieces on one uniform grid: x from origin to origin + (last + 1)·step."""

    origin: float  # x at node 0
    inv_step: float  # 1 / step, per unit of x
    last: int  # index of the last interval
    coeffs: tuple[tuple[float, float, float, float], ...]  # Horner a, b, c, d per interval


class _Table(NamedTuple):
    """One property on one or two consecutive segments; x ≤ split uses segments[0]."""

    split: float  # +inf when there is one segment
    segments: tuple[_Segment, ...]
    # The same pieces laid out for the numpy path (all read-only):
    origins: FloatArray  # per segment
    inv_steps: FloatArray  # per segment
    lasts: IntArray  # per segment
    offsets: IntArray  # per segment: column of its first interval in ``rows``
    rows: FloatArray  # shape (4, all intervals): rows of a, b, c and d


class _LiquidTables(NamedTuple):
    """Liquid properties on (the 1-atm isobar to t_b, the saturated-liquid line above)."""

    cp: _Table  # J/(kg·K)
    rho: _Table  # kg/m³
    h: _Table  # J/kg


def _hermite_segment(
    values: list[float], slopes: list[float], origin: float, step: float
) -> _Segment:
    """Return a _Segment whose cubics match the node values and slopes (per unit x)."""
    pieces = []
    for i in range(len(values) - 1):
        # On u = (x − x_i)/step ∈ [0, 1]: f = a + u(b + u(c + u·d)), with the slopes
        # scaled to u: m = step·f'.
        p0, p1 = values[i], values[i + 1]
        m0, m1 = step * slopes[i], step * slopes[i + 1]
        a = p0
        b = m0
        c = 3.0 * (p1 - p0) - 2.0 * m0 - m1
        d = 2.0 * (p0 - p1) + m0 + m1
        # Plain floats: iapws returns numpy scalars, which are slower to do sums on
        # and would leak numpy types out of the scalar path.
        pieces.append((float(a), float(b), float(c), float(d)))
    return _Segment(float(origin), 1.0 / float(step), len(pieces) - 1, tuple(pieces))


def _read_only(array: np.ndarray) -> np.ndarray:
    array.setflags(write=False)
    return array


def _make_table(segments: tuple[_Segment, ...], split: float = math.inf) -> _Table:
    """Return a _Table over ``segments`` (one, or two meeting at ``split``)."""
    sizes = [seg.last + 1 for seg in segments]
    return _Table(
        split=split,
        segments=segments,
        origins=_read_only(np.array([seg.origin for seg in segments])),
        inv_steps=_read_only(np.array([seg.inv_step for seg in segments])),
        lasts=_read_only(np.array([seg.last for seg in segments], dtype=np.intp)),
        offsets=_read_only(np.cumsum([0, *sizes[:-1]], dtype=np.intp)),
        rows=_read_only(np.array([piece for seg in segments for piece in seg.coeffs]).T.copy()),
    )


def _tabulate(
    props: Callable[[float], tuple[float, ...]], lo: float, hi: float, n: int
) -> list[_Segment]:
    """Return one _Segment per output of ``props`` over [lo, hi] in n equal intervals."""
    step = (hi - lo) / n
    dx = step * _SLOPE_STEP_FRACTION
    nodes = [lo + i * step for i in range(n)] + [hi]
    values = [props(x) for x in nodes]
    # f'(x) ≈ (f(x + dx) − f(x − dx)) / 2dx; the IF97 functions are analytic a little
    # past every end used here, so the same formula serves the end nodes.
    slopes = []
    for x in nodes:
        up, down = props(x + dx), props(x - dx)
        slopes.append([(u - v) / (2.0 * dx) for u, v in zip(up, down, strict=True)])
    n_out = len(values[0])
    return [
        _hermite_segment([v[k] for v in values], [s[k] for s in slopes], lo, step)
        for k in range(n_out)
    ]


def _liquid_segments_from_if97() -> list[list[_Segment]]:
    """Return [below t_b, above t_b], each the (c_p, ρ, h) segments, tabulated from IF97."""
    # iapws's region functions are private API; tests/monitor/test_water.py checks them
    # against the IF97 verification tables and against iapws.IAPWS97 itself.
    from iapws.iapws97 import _PSat_T, _Region1  # deferred: a slow import

    def along(on_isobar: bool) -> Callable[[float], tuple[float, ...]]:
        def props(t_c: float) -> tuple[float, ...]:
            t_k = t_c + ZERO_CELSIUS_K
            p_mpa = STANDARD_PRESSURE_KPA * _MPA_PER_KPA if on_isobar else _PSat_T(t_k)
            r = _Region1(t_k, p_mpa)
            # iapws gives kJ/(kg·K), m³/kg and kJ/kg.
            return (r["cp"] * J_PER_KJ, 1.0 / r["v"], r["h"] * J_PER_KJ)

        return props

    tb = _NORMAL_BOILING_POINT_C
    return [
        _tabulate(along(on_isobar=True), T_MIN_C, tb, _N_LIQUID_BELOW_TB),
        _tabulate(along(on_isobar=False), tb, T_MAX_C, _N_LIQUID_ABOVE_TB),
    ]


def _latent_segment_from_if97() -> _Segment:
    """Return the h_fg segment (J/kg against x = p^(1/4), p in kPa), tabulated from IF97."""
    from iapws.iapws97 import _Region1, _Region2, _TSat_P  # deferred: a slow import

    def props(x: float) -> tuple[float, ...]:
        p_mpa = x**4 * _MPA_PER_KPA
        t_k = _TSat_P(p_mpa)
        # Saturated vapour from region 2, saturated liquid from region 1, at (T_s, p).
        return ((_Region2(t_k, p_mpa)["h"] - _Region1(t_k, p_mpa)["h"]) * J_PER_KJ,)

    return _tabulate(props, P_MIN_KPA**0.25, P_MAX_KPA**0.25, _N_LATENT)[0]


#: The tables as shipped: :func:`tables_document` written out by
#: ``scripts/water_tables.py``; a test checks it against a fresh build from IF97, bit for bit.
TABLES_PATH = Path(__file__).with_name("water_tables.json")
#: What ``format`` holds in that file.
TABLES_FORMAT = "ebullio-water-tables"


def tables_document() -> dict[str, object]:
    """Return every table built afresh from IF97 (iapws), as a JSON-ready document.

    Floats are written as ``float.hex`` strings, so reading them back is exact.
    """

    def segment(seg: _Segment) -> dict[str, object]:
        return {
            "origin": seg.origin.hex(),
            "inv_step": seg.inv_step.hex(),
            "coeffs": [[v.hex() for v in piece] for piece in seg.coeffs],
        }

    below, above = _liquid_segments_from_if97()
    return {
        "format": TABLES_FORMAT,
        "version": 1,
        "what": "cubic Hermite pieces of IAPWS-IF97 water properties (monitor/physics/water.py)",
        "grid": _TABLE_GRID,
        "liquid_below_tb": [segment(seg) for seg in below],
        "liquid_above_tb": [segment(seg) for seg in above],
        "latent": segment(_latent_segment_from_if97()),
    }


@functools.cache
def _shipped_tables() -> dict[str, object] | None:
    """Return the shipped tables' document, or None (with a warning) when it is missing,
    unreadable or for another grid: the tables are then built from IF97 (about 0.5 s)."""
    try:
        doc = json.loads(TABLES_PATH.read_text(encoding="utf-8"))
        version_ok = doc.get("format") == TABLES_FORMAT and doc.get("version") == 1
        if version_ok and doc["grid"] == _TABLE_GRID:
            return doc
        problem = "it is for another table layout"
    except (OSError, ValueError, KeyError, TypeError, AttributeError) as exc:
        problem = str(exc)
    _log.warning("water tables: %s not used (%s); building them from IF97", TABLES_PATH, problem)
    return None


def _segment_of(data: dict[str, object]) -> _Segment:
    coeffs = tuple(tuple(float.fromhex(v) for v in piece) for piece in data["coeffs"])
    return _Segment(
        float.fromhex(data["origin"]), float.fromhex(data["inv_step"]), len(coeffs) - 1, coeffs
    )


@functools.cache
def _liquid_tables() -> _LiquidTables:
    """Return the c_p, density and enthalpy tables: shipped, else built from IF97."""
    doc = _shipped_tables()
    if doc is not None:
        below = [_segment_of(d) for d in doc["liquid_below_tb"]]
        above = [_segment_of(d) for d in doc["liquid_above_tb"]]
    else:
        below, above = _liquid_segments_from_if97()
    cp, rho, h = (
        _make_table((low, high), split=_NORMAL_BOILING_POINT_C)
        for low, high in zip(below, above, strict=True)
    )
    return _LiquidTables(cp=cp, rho=rho, h=h)


@functools.cache
def _latent_table() -> _Table:
    """Return the h_fg table (J/kg against x = p^(1/4), p in kPa): shipped, else from IF97."""
    doc = _shipped_tables()
    seg = _segment_of(doc["latent"]) if doc is not None else _latent_segment_from_if97()
    return _make_table((seg,))


def build_tables() -> None:
    """Return None after building every table now (≈ 0.5 s once: iapws import and build).

    Call it at start-up so the first property call inside a filter loop is not the
    slow one. Later calls cost nothing.
    """
    _liquid_tables()
    _latent_table()


# --- Evaluation ----------------------------------------------------------------------


def _range_error(name: str, value: float, lo: float, hi: float, unit: str) -> PhysicsRangeError:
    return PhysicsRangeError(
        f"{name} = {value!r} {unit} is outside {lo:g}..{hi:g} {unit}, the range "
        "monitor.physics.water covers (IAPWS-IF97 tables, ICAO troposphere)"
    )


def _mass_error(value: float) -> PhysicsRangeError:
    return PhysicsRangeError(f"mass_kg = {value!r} kg must be finite and not negative")


def _check_array(x: FloatArray, name: str, lo: float, hi: float, unit: str) -> None:
    # NaN fails both comparisons, so it is rejected too.
    inside = (x >= lo) & (x <= hi)
    if not np.all(inside):
        raise _range_error(name, float(x[~inside].ravel()[0]), lo, hi, unit)


def _segment_scalar(seg: _Segment, x: float) -> float:
    origin, inv_step, last, coeffs = seg
    u = (x - origin) * inv_step
    i = int(u)
    if i > last:  # x on the segment's upper end
        i = last
    a, b, c, d = coeffs[i]
    u -= i
    return a + u * (b + u * (c + u * d))


def _table_array(table: _Table, x: FloatArray) -> FloatArray:
    k = (x > table.split).astype(np.intp)  # which segment each x falls in
    u = (x - table.origins[k]) * table.inv_steps[k]
    i = np.minimum(u.astype(np.intp), table.lasts[k])
    u = u - i
    a, b, c, d = table.rows[:, i + table.offsets[k]]
    return a + u * (b + u * (c + u * d))


def _liquid_scalar(table: _Table, t_c: float) -> float:
    if not T_MIN_C <= t_c <= T_MAX_C:
        raise _range_error("t_c", t_c, T_MIN_C, T_MAX_C, "°C")
    low, high = table.segments
    return _segment_scalar(low if t_c <= _NORMAL_BOILING_POINT_C else high, t_c)


def _liquid_array(table: _Table, t_c: FloatArray) -> FloatArray:
    t = np.asarray(t_c, dtype=np.float64)
    _check_array(t, "t_c", T_MIN_C, T_MAX_C, "°C")
    return _table_array(table, t)


# --- Public functions --------------------------------------------------------------------


def specific_heat_j_per_kg_k(t_c: FloatOrArray) -> FloatOrArray:
    """Return the isobaric specific heat c_p of liquid water at t_c (°C), in J/(kg·K).

    IAPWS-IF97 region 1 along the 101.325 kPa isobar up to the normal boiling point
    (99.974 °C), then along the saturated-liquid line to 150 °C, interpolated from a
    table (error ≤ 2e-9 relative to IF97 on those lines). Over 50–110 kPa, c_p
    itself changes by at most 5.9e-5 relative, which this function ignores.

    Raises PhysicsRangeError for t_c outside 0–150 °C (or NaN).
    """
    if isinstance(t_c, np.ndarray):
        return _liquid_array(_liquid_tables().cp, t_c)
    return _liquid_scalar(_liquid_tables().cp, t_c)


def density_kg_per_m3(t_c: FloatOrArray) -> FloatOrArray:
    """Return the density of liquid water at t_c (°C), in kg/m³.

    Same lines and range as :func:`specific_heat_j_per_kg_k` (error ≤ 2e-10
    relative to IF97 on them). Over 50–110 kPa the density itself changes by at most
    2.6e-5 relative (compressibility ≈ 0.46 /GPa), which this function ignores.

    Raises PhysicsRangeError for t_c outside 0–150 °C (or NaN).
    """
    if isinstance(t_c, np.ndarray):
        return _liquid_array(_liquid_tables().rho, t_c)
    return _liquid_scalar(_liquid_tables().rho, t_c)


def specific_enthalpy_j_per_kg(t_c: FloatOrArray) -> FloatOrArray:
    """Return the specific enthalpy of liquid water at t_c (°C), in J/kg.

    Relative to IF97's reference state, u = 0 and s = 0 for saturated liquid at the
    triple point (h ≈ 0.6 J/kg there; on the 1-atm isobar h(0.01 °C) ≈ 103 J/kg,
    mostly v·Δp). Same lines and range as :func:`specific_heat_j_per_kg_k` (error
    ≤ 1e-4 J/kg against IF97 on them). At another pressure h differs by about v·Δp:
    up to 52 J/kg over 50–110 kPa, nearly the same at every temperature, so
    differences of h (heating energies) stay within 5.8e-5 relative.

    Raises PhysicsRangeError for t_c outside 0–150 °C (or NaN).
    """
    if isinstance(t_c, np.ndarray):
        return _liquid_array(_liquid_tables().h, t_c)
    return _liquid_scalar(_liquid_tables().h, t_c)


def mean_specific_heat_j_per_kg_k(t0_c: float, t1_c: float) -> float:
    """Return the mean isobaric specific heat of liquid water between t0_c and t1_c (°C).

    In J/(kg·K): (h(t1) - h(t0)) / (t1 - t0), the heat capacity a lumped model with one
    constant c_p sees over that range (the first law over the range, not c_p at one
    end). Within 0.01 K of each other it is c_p at their middle. Same lines and range
    as :func:`specific_heat_j_per_kg_k`; raises PhysicsRangeError outside 0-150 °C.
    """
    if abs(t1_c - t0_c) < 0.01:
        return float(specific_heat_j_per_kg_k(0.5 * (t0_c + t1_c)))
    dh = float(specific_enthalpy_j_per_kg(t1_c)) - float(specific_enthalpy_j_per_kg(t0_c))
    return dh / (t1_c - t0_c)


def heating_energy_j(
    mass_kg: FloatOrArray, from_c: FloatOrArray, to_c: FloatOrArray
) -> FloatOrArray:
    """Return the heat that takes mass_kg of liquid water from from_c to to_c (°C), in J.

    Q = m·(h(to_c) − h(from_c)) with h from :func:`specific_enthalpy_j_per_kg`: the
    enthalpy change along the 1-atm isobar (the saturated-liquid line above
    99.974 °C), so the integral of the varying c_p rather than m·c_p·ΔT with a fixed
    one. For heating at any constant pressure in 50–110 kPa it is within 5.8e-5
    relative of IF97 (ΔT ≥ 1 K). It is negative when to_c < from_c (heat given up on
    cooling). Both temperatures must be liquid states, 0–150 °C; no evaporation is
    included.

    Raises PhysicsRangeError for a negative, infinite or NaN mass or a temperature
    outside 0–150 °C.
    """
    if isinstance(mass_kg, np.ndarray):
        m = np.asarray(mass_kg, dtype=np.float64)
        bad = ~((m >= 0.0) & (m < math.inf))  # NaN is bad too
        if np.any(bad):
            raise _mass_error(float(m[bad].ravel()[0]))
    elif not 0.0 <= mass_kg < math.inf:
        raise _mass_error(mass_kg)
    return mass_kg * (specific_enthalpy_j_per_kg(to_c) - specific_enthalpy_j_per_kg(from_c))


def boiling_point_c(pressure_kpa: FloatOrArray) -> FloatOrArray:
    """Return the saturation (boiling) temperature of water at pressure_kpa (kPa), in °C.

    The IAPWS-IF97 region-4 backward equation T_s(p) (eq. 31), evaluated directly:
    exact IF97, no table. 99.974 °C at 101.325 kPa.

    Raises PhysicsRangeError for pressure_kpa outside 1–500 kPa (or NaN).
    """
    if isinstance(pressure_kpa, np.ndarray):
        p = np.asarray(pressure_kpa, dtype=np.float64)
        _check_array(p, "pressure_kpa", P_MIN_KPA, P_MAX_KPA, "kPa")
        return _saturation_temperature_k(p * _MPA_PER_KPA) - ZERO_CELSIUS_K
    if not P_MIN_KPA <= pressure_kpa <= P_MAX_KPA:
        raise _range_error("pressure_kpa", pressure_kpa, P_MIN_KPA, P_MAX_KPA, "kPa")
    return _saturation_temperature_k(pressure_kpa * _MPA_PER_KPA) - ZERO_CELSIUS_K


def latent_heat_j_per_kg(pressure_kpa: FloatOrArray) -> FloatOrArray:
    """Return the latent heat of vaporisation h_fg = h'' − h' at pressure_kpa (kPa), in J/kg.

    Saturated vapour (IF97 region 2) minus saturated liquid (region 1) at the
    saturation temperature :func:`boiling_point_c` gives, interpolated from a table
    against p^(1/4) (error ≤ 2e-10 relative to IF97). 2256.54 kJ/kg at 101.325 kPa.

    Raises PhysicsRangeError for pressure_kpa outside 1–500 kPa (or NaN).
    """
    table = _latent_table()
    if isinstance(pressure_kpa, np.ndarray):
        p = np.asarray(pressure_kpa, dtype=np.float64)
        _check_array(p, "pressure_kpa", P_MIN_KPA, P_MAX_KPA, "kPa")
        return _table_array(table, p**0.25)
    if not P_MIN_KPA <= pressure_kpa <= P_MAX_KPA:
        raise _range_error("pressure_kpa", pressure_kpa, P_MIN_KPA, P_MAX_KPA, "kPa")
    return _segment_scalar(table.segments[0], pressure_kpa**0.25)


def pressure_at_altitude_kpa(altitude_m: FloatOrArray) -> FloatOrArray:
    """Return the ICAO standard-atmosphere pressure at altitude_m (m above sea level), in kPa.

    altitude_m is the geometric elevation z (what a map or GPS gives). The ICAO
    troposphere law is written in geopotential altitude H, so it is converted first
    with H = r0·z/(r0 + z), r0 = 6 356 766 m (H is 0.16 m below z at 1000 m and
    3.9 m below at 5000 m: 1.7 Pa and 28 Pa of pressure), then
    p = p0·(1 − L·H/T0)^(g0/(R·L)) with p0 = 101.325 kPa, T0 = 288.15 K,
    L = 0.0065 K/m, R = 287.05287 J/(kg·K), g0 = 9.80665 m/s² (ICAO Doc 7488).

    This is the standard atmosphere, not the weather: real pressure commonly differs
    by a few per cent, so use a measured pressure when there is one.

    Raises PhysicsRangeError for altitude_m outside −500 to 11 000 m (or NaN).
    """
    if isinstance(altitude_m, np.ndarray):
        z = np.asarray(altitude_m, dtype=np.float64)
        _check_array(z, "altitude_m", ALTITUDE_MIN_M, ALTITUDE_MAX_M, "m")
    elif not ALTITUDE_MIN_M <= altitude_m <= ALTITUDE_MAX_M:
        raise _range_error("altitude_m", altitude_m, ALTITUDE_MIN_M, ALTITUDE_MAX_M, "m")
    else:
        z = altitude_m
    geopotential_m = ISA_EARTH_RADIUS_M * z / (ISA_EARTH_RADIUS_M + z)
    return _ISA_P0_KPA * (1.0 - _ISA_L_OVER_T0_PER_M * geopotential_m) ** _ISA_EXPONENT

"""Water for the simulated world, straight from IAPWS-IF97 (``iapws``).

Not from ``monitor/physics/water.py``: ``drivers/`` imports nothing from ``monitor/``, and the
simulated world should not share the estimator's shortcuts (its precomputed tables).
Liquid properties are memoised on a 0.01 K grid.
"""

from __future__ import annotations

from functools import lru_cache

from iapws import IAPWS97
from iapws.iapws97 import _Region1, _TSat_P

from drivers.constants import ZERO_CELSIUS_K


@lru_cache(maxsize=65536)
def _liquid(t_centi_k: int, p_kpa: float) -> tuple[float, float]:
    """Return (c_p J/(kg·K), h J/kg) of liquid water at t_centi_k/100 K and p_kpa."""
    props = _Region1(t_centi_k / 100.0, p_kpa / 1000.0)
    return float(props["cp"]) * 1000.0, float(props["h"]) * 1000.0


def liquid_cp_j_per_kg_k(t_c: float, p_kpa: float) -> float:
    """Return c_p of liquid water in J/(kg·K), IF97 region 1 at the nearest 0.01 K."""
    return _liquid(round((t_c + ZERO_CELSIUS_K) * 100.0), p_kpa)[0]


def liquid_h_j_per_kg(t_c: float, p_kpa: float) -> float:
    """Return the specific enthalpy of liquid water in J/kg, IF97 region 1 (exact T)."""
    return float(_Region1(t_c + ZERO_CELSIUS_K, p_kpa / 1000.0)["h"]) * 1000.0


def liquid_h_grid_j_per_kg(t_c: float, p_kpa: float) -> float:
    """Return the enthalpy of liquid water in J/kg at the nearest 0.01 K (for draw-offs)."""
    return _liquid(round((t_c + ZERO_CELSIUS_K) * 100.0), p_kpa)[1]


@lru_cache(maxsize=64)
def saturation(p_kpa: float) -> tuple[float, float]:
    """Return (boiling point °C, latent heat J/kg) at p_kpa, from IAPWS-IF97."""
    t_sat_c = float(_TSat_P(p_kpa / 1000.0)) - ZERO_CELSIUS_K
    h_f = IAPWS97(P=p_kpa / 1000.0, x=0.0).h
    h_g = IAPWS97(P=p_kpa / 1000.0, x=1.0).h
    return t_sat_c, float(h_g - h_f) * 1000.0

"""ITS-90 thermocouple reference functions for the letter types B, E, J, K, N, R, S and T.

What it does
    :func:`emf_mv` gives the thermoelectric EMF (mV) of a thermocouple whose reference
    junction sits at 0 °C. :func:`temperature_c` turns a measured EMF back into the
    hot-junction temperature (°C), compensating for the cold junction.
    :func:`seebeck_uv_per_k` gives the sensitivity dE/dt (µV/K), which is what an error in
    the cold-junction temperature is multiplied by. :func:`classify_emf` is the front door for
    drivers: it never raises on a bad reading, it hands back a :class:`Reading` marked
    ``fault`` with ``NaN`` and a reason, so a broken wire cannot become a temperature.

Sources
    The reference functions E(t) and their approximate inverses t(E), with the error band
    of each inverse range, are those of NIST Monograph 175 (1993) as published in NIST
    Standard Reference Database 60; IEC 60584-1 adopts the same functions. The coefficients
    below are the NIST SRD 60 sets, and the tests check them against values computed
    from those functions and against NIST table values (the latter from memory).

Cold-junction compensation (CJC)
    A thermocouple only reports the difference E_meas = E(t_hot) − E(t_cj). Compensation is
    therefore done in EMF: E_total = E_meas + E(t_cj), then t_hot = t(E_total). Temperatures
    are never added (t(E_meas) + t_cj is wrong, because E(t) is not a straight line).

How the inverse is evaluated
    1. Within a NIST inverse range the NIST polynomial gives t within the band NIST quotes
       for that range (at most 0.06 °C). Where two ranges overlap (R and S between about
       1064 °C and 1200 °C) the higher range is used, since its band is the tighter one.
       An EMF exactly on a limit shared by two ranges belongs to the lower range.
    2. By default the result is then polished with two Newton steps on the forward
       function, so that E(t) matches E_total to well under 1e-6 mV, and kept within the
       type's temperature range; ``polish=False`` returns the plain NIST polynomial value.
    3. Where no inverse polynomial covers an EMF that the forward function does reach, the
       forward function itself is solved (Newton's method kept inside a shrinking bracket,
       bisecting whenever a Newton step would leave it). That covers −270 to −200 °C for
       E, K, N and T, and the thin slivers at the range ends where the forward range reaches
       a little beyond the published inverse limits (R and S near −50 °C, S near 1768.1 °C,
       K at 1372 °C, B at 1820 °C).
    4. Type B is not inverted below 0.291 mV (about 250 °C), NIST's lower inverse limit: its
       E(t) falls below zero between 0 °C and about 42 °C, so an EMF there fits two
       temperatures, and below 250 °C it changes by only a few µV per kelvin anyway. Such an
       EMF raises :class:`~drivers.errors.ThermocoupleRangeError`.
    5. The invertible EMF range runs from E(t_min) to E(t_max), widened to NIST's rounded
       inverse limit where that lies a little beyond (T 20.872 mV, E 76.373 mV, N 47.513 mV,
       R 21.103 mV, all within 1 µV), plus 1 nV of slack for rounding noise.

All public functions accept the type letter in either case.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from types import MappingProxyType

from drivers.errors import ConfigError, ThermocoupleRangeError
from drivers.sample import Quality

__all__ = [
    "DEFAULT_OPEN_CIRCUIT_MV",
    "TC_TYPES",
    "ForwardRange",
    "InverseRange",
    "Reading",
    "ThermocoupleTable",
    "classify_emf",
    "emf_mv",
    "reference_table",
    "seebeck_uv_per_k",
    "temperature_c",
]

#: An |EMF| beyond this (mV) is taken as an open circuit. No letter type exceeds about 77 mV
#: (type E at 1000 °C), while an open input usually drives the ADC to its full scale or its
#: burn-out current to a large voltage (common practice, no source).
DEFAULT_OPEN_CIRCUIT_MV = 100.0

# --------------------------------------------------------------------------------------------
# Coefficients: NIST SRD 60 (NIST Monograph 175), as adopted by IEC 60584-1.
# Forward sets: c0, c1, ... with E = Σ c_i t^i (E in mV, t in °C, reference junction 0 °C).
# Inverse sets: d0, d1, ... with t90 = Σ d_i E^i.
# --------------------------------------------------------------------------------------------

# Type K
_K_FWD_LOW = (
    0.0, 3.9450128025e-02, 2.3622373598e-05, -3.2858906784e-07,
    -4.9904828777e-09, -6.7509059173e-11, -5.7410327428e-13, -3.1088872894e-15,
    -1.0451609365e-17, -1.9889266878e-20, -1.6322697486e-23,
)  # fmt: skip
_K_FWD_HIGH = (
    -1.7600413686e-02, 3.8921204975e-02, 1.8558770032e-05, -9.9457592874e-08,
    3.1840945719e-10, -5.6072844889e-13, 5.6075059059e-16, -3.2020720003e-19,
    9.7151147152e-23, -1.2104721275e-26,
)  # fmt: skip
#: a0 (mV), a1 (°C⁻²), a2 (°C) of the term a0·exp(a1·(t − a2)²), 0 < t ≤ 1372 °C only.
_K_EXP = (1.185976e-01, -1.183432e-04, 1.269686e02)
_K_INV_1 = (
    0.0, 2.5173462e01, -1.1662878e00, -1.0833638e00, -8.977354e-01,
    -3.7342377e-01, -8.6632643e-02, -1.0450598e-02, -5.1920577e-04,
)  # fmt: skip
_K_INV_2 = (
    0.0, 2.508355e01, 7.860106e-02, -2.503131e-01, 8.31527e-02,
    -1.228034e-02, 9.804036e-04, -4.41303e-05, 1.057734e-06, -1.052755e-08,
)  # fmt: skip
_K_INV_3 = (
    -1.318058e02, 4.830222e01, -1.646031e00, 5.464731e-02,
    -9.650715e-04, 8.802193e-06, -3.11081e-08,
)  # fmt: skip

# Type J
_J_FWD_LOW = (
    0.0, 5.0381187815e-02, 3.047583693e-05, -8.568106572e-08, 1.3228195295e-10,
    -1.7052958337e-13, 2.0948090697e-16, -1.2538395336e-19, 1.5631725697e-23,
)  # fmt: skip
_J_FWD_HIGH = (
    2.9645625681e02, -1.4976127786e00, 3.1787103924e-03,
    -3.1847686701e-06, 1.5720819004e-09, -3.0691369056e-13,
)  # fmt: skip
_J_INV_1 = (
    0.0, 1.9528268e01, -1.2286185e00, -1.0752178e00, -5.9086933e-01,
    -1.7256713e-01, -2.8131513e-02, -2.396337e-03, -8.3823321e-05,
)  # fmt: skip
_J_INV_2 = (
    0.0, 1.978425e01, -2.001204e-01, 1.036969e-02,
    -2.549687e-04, 3.585153e-06, -5.344285e-08, 5.09989e-10,
)  # fmt: skip
_J_INV_3 = (
    -3.11358187e03, 3.00543684e02, -9.9477323e00,
    1.7027663e-01, -1.43033468e-03, 4.73886084e-06,
)  # fmt: skip

# Type T
_T_FWD_LOW = (
    0.0, 3.8748106364e-02, 4.4194434347e-05, 1.1844323105e-07, 2.0032973554e-08,
    9.0138019559e-10, 2.2651156593e-11, 3.6071154205e-13, 3.8493939883e-15,
    2.8213521925e-17, 1.4251594779e-19, 4.8768662286e-22, 1.079553927e-24,
    1.3945027062e-27, 7.9795153927e-31,
)  # fmt: skip
_T_FWD_HIGH = (
    0.0, 3.8748106364e-02, 3.329222788e-05, 2.0618243404e-07, -2.1882256846e-09,
    1.0996880928e-11, -3.0815758772e-14, 4.547913529e-17, -2.7512901673e-20,
)  # fmt: skip
_T_INV_1 = (
    0.0, 2.5949192e01, -2.1316967e-01, 7.9018692e-01,
    4.2527777e-01, 1.3304473e-01, 2.0241446e-02, 1.2668171e-03,
)  # fmt: skip
_T_INV_2 = (
    0.0, 2.5928e01, -7.602961e-01, 4.637791e-02,
    -2.165394e-03, 6.048144e-05, -7.293422e-07,
)  # fmt: skip

# Type E
_E_FWD_LOW = (
    0.0, 5.8665508708e-02, 4.5410977124e-05, -7.7998048686e-07, -2.5800160843e-08,
    -5.9452583057e-10, -9.3214058667e-12, -1.0287605534e-13, -8.0370123621e-16,
    -4.3979497391e-18, -1.6414776355e-20, -3.9673619516e-23, -5.5827328721e-26,
    -3.4657842013e-29,
)  # fmt: skip
_E_FWD_HIGH = (
    0.0, 5.866550871e-02, 4.5032275582e-05, 2.8908407212e-08, -3.3056896652e-10,
    6.502440327e-13, -1.9197495504e-16, -1.2536600497e-18, 2.1489217569e-21,
    -1.4388041782e-24, 3.5960899481e-28,
)  # fmt: skip
_E_INV_1 = (
    0.0, 1.6977288e01, -4.351497e-01, -1.5859697e-01, -9.2502871e-02,
    -2.6084314e-02, -4.1360199e-03, -3.403403e-04, -1.156489e-05,
)  # fmt: skip
_E_INV_2 = (
    0.0, 1.7057035e01, -2.3301759e-01, 6.5435585e-03, -7.3562749e-05,
    -1.7896001e-06, 8.4036165e-08, -1.3735879e-09, 1.0629823e-11, -3.2447087e-14,
)  # fmt: skip

# Type N
_N_FWD_LOW = (
    0.0, 2.6159105962e-02, 1.0957484228e-05, -9.3841111554e-08, -4.6412039759e-11,
    -2.6303357716e-12, -2.2653438003e-14, -7.6089300791e-17, -9.3419667835e-20,
)  # fmt: skip
_N_FWD_HIGH = (
    0.0, 2.5929394601e-02, 1.571014188e-05, 4.3825627237e-08, -2.5261169794e-10,
    6.4311819339e-13, -1.0063471519e-15, 9.9745338992e-19, -6.0863245607e-22,
    2.0849229339e-25, -3.0682196151e-29,
)  # fmt: skip
_N_INV_1 = (
    0.0, 3.8436847e01, 1.1010485e00, 5.2229312e00, 7.2060525e00,
    5.8488586e00, 2.7754916e00, 7.7075166e-01, 1.1582665e-01, 7.3138868e-03,
)  # fmt: skip
_N_INV_2 = (
    0.0, 3.86896e01, -1.08267e00, 4.70205e-02,
    -2.12169e-06, -1.17272e-04, 5.3928e-06, -7.98156e-08,
)  # fmt: skip
_N_INV_3 = (
    1.972485e01, 3.300943e01, -3.915159e-01,
    9.855391e-03, -1.274371e-04, 7.767022e-07,
)  # fmt: skip

# Type R
_R_FWD_1 = (
    0.0, 5.28961729765e-03, 1.39166589782e-05, -2.38855693017e-08, 3.56916001063e-11,
    -4.62347666298e-14, 5.00777441034e-17, -3.73105886191e-20, 1.57716482367e-23,
    -2.81038625251e-27,
)  # fmt: skip
_R_FWD_2 = (
    2.95157925316e00, -2.52061251332e-03, 1.59564501865e-05,
    -7.64085947576e-09, 2.05305291024e-12, -2.93359668173e-16,
)  # fmt: skip
_R_FWD_3 = (
    1.52232118209e02, -2.68819888545e-01, 1.71280280471e-04,
    -3.45895706453e-08, -9.34633971046e-15,
)  # fmt: skip
_R_INV_1 = (
    0.0, 1.889138e02, -9.383529e01, 1.3068619e02, -2.270358e02, 3.5145659e02,
    -3.89539e02, 2.8239471e02, -1.2607281e02, 3.1353611e01, -3.3187769e00,
)  # fmt: skip
_R_INV_2 = (
    1.334584505e01, 1.472644573e02, -1.844024844e01, 4.031129726e00, -6.24942836e-01,
    6.468412046e-02, -4.458750426e-03, 1.994710149e-04, -5.31340179e-06, 6.481976217e-08,
)  # fmt: skip
_R_INV_3 = (
    -8.199599416e01, 1.553962042e02, -8.342197663e00,
    4.279433549e-01, -1.19157791e-02, 1.492290091e-04,
)  # fmt: skip
_R_INV_4 = (
    3.406177836e04,
    -7.023729171e03,
    5.582903813e02,
    -1.952394635e01,
    2.560740231e-01,
)

# Type S
_S_FWD_1 = (
    0.0, 5.40313308631e-03, 1.2593428974e-05, -2.32477968689e-08, 3.22028823036e-11,
    -3.31465196389e-14, 2.55744251786e-17, -1.25068871393e-20, 2.71443176145e-24,
)  # fmt: skip
_S_FWD_2 = (
    1.32900444085e00, 3.34509311344e-03, 6.54805192818e-06,
    -1.64856259209e-09, 1.29989605174e-14,
)  # fmt: skip
_S_FWD_3 = (
    1.46628232636e02, -2.58430516752e-01, 1.63693574641e-04,
    -3.30439046987e-08, -9.43223690612e-15,
)  # fmt: skip
_S_INV_1 = (
    0.0, 1.8494946e02, -8.00504062e01, 1.0223743e02, -1.52248592e02,
    1.88821343e02, -1.59085941e02, 8.2302788e01, -2.34181944e01, 2.7978626e00,
)  # fmt: skip
_S_INV_2 = (
    1.291507177e01, 1.466298863e02, -1.534713402e01, 3.145945973e00, -4.163257839e-01,
    3.187963771e-02, -1.2916375e-03, 2.183475087e-05, -1.447379511e-07, 8.211272125e-09,
)  # fmt: skip
_S_INV_3 = (
    -8.087801117e01, 1.621573104e02, -8.536869453e00,
    4.719686976e-01, -1.441693666e-02, 2.08161889e-04,
)  # fmt: skip
_S_INV_4 = (
    5.333875126e04,
    -1.235892298e04,
    1.092657613e03,
    -4.265693686e01,
    6.24720542e-01,
)

# Type B
_B_FWD_LOW = (
    0.0, -2.4650818346e-04, 5.9040421171e-06, -1.3257931636e-09,
    1.5668291901e-12, -1.694452924e-15, 6.2990347094e-19,
)  # fmt: skip
_B_FWD_HIGH = (
    -3.8938168621e00, 2.857174747e-02, -8.4885104785e-05, 1.5785280164e-07,
    -1.6835344864e-10, 1.1109794013e-13, -4.4515431033e-17, 9.8975640821e-21,
    -9.3791330289e-25,
)  # fmt: skip
_B_INV_1 = (
    9.8423321e01, 6.99715e02, -8.4765304e02, 1.0052644e03, -8.3345952e02,
    4.5508542e02, -1.5523037e02, 2.988675e01, -2.474286e00,
)  # fmt: skip
_B_INV_2 = (
    2.1315071e02, 2.8510504e02, -5.2742887e01, 9.9160804e00, -1.2965303e00,
    1.119587e-01, -6.0625199e-03, 1.8661696e-04, -2.4878585e-06,
)  # fmt: skip


# --------------------------------------------------------------------------------------------
# Polynomials
# --------------------------------------------------------------------------------------------


def _horner(coeffs: tuple[float, ...], x: float) -> float:
    """Return Σ coeffs[i]·x^i by Horner's rule (coefficients in ascending order)."""
    acc = 0.0
    for c in reversed(coeffs):
        acc = acc * x + c
    return acc


def _horner_with_slope(coeffs: tuple[float, ...], x: float) -> tuple[float, float]:
    """Return (p(x), p'(x)) of Σ coeffs[i]·x^i in one Horner pass."""
    p = 0.0
    dp = 0.0
    for c in reversed(coeffs):
        dp = dp * x + p
        p = p * x + c
    return p, dp


# --------------------------------------------------------------------------------------------
# Table structure
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class ForwardRange:
    """One temperature range of a reference function E(t), with t_lo_c < t ≤ t_hi_c.

    ``coeffs`` are c0, c1, ... in mV/°C^i. ``exponential`` is type K's (a0 mV, a1 °C⁻²,
    a2 °C) for the term a0·exp(a1·(t − a2)²), or ``None``.
    """

    t_lo_c: float
    t_hi_c: float
    coeffs: tuple[float, ...]
    exponential: tuple[float, float, float] | None = None

    def emf_mv(self, t_c: float) -> float:
        """Return this range's E(t) in mV, without checking that t_c lies in the range."""
        e = _horner(self.coeffs, t_c)
        if self.exponential is not None:
            a0, a1, a2 = self.exponential
            u = t_c - a2
            e += a0 * math.exp(a1 * u * u)
        return e

    def emf_and_slope(self, t_c: float) -> tuple[float, float]:
        """Return (E in mV, dE/dt in mV/K) of this range at t_c, without a range check."""
        e, s = _horner_with_slope(self.coeffs, t_c)
        if self.exponential is not None:
            a0, a1, a2 = self.exponential
            u = t_c - a2
            g = a0 * math.exp(a1 * u * u)
            e += g
            s += 2.0 * a1 * u * g
        return e, s


@dataclass(frozen=True, slots=True)
class InverseRange:
    """One NIST inverse range t90(E) = Σ d_i E^i, valid for emf_lo_mv ≤ E ≤ emf_hi_mv.

    ``t_lo_c`` and ``t_hi_c`` are the temperatures NIST gives for the range;
    ``error_lo_c`` and ``error_hi_c`` bound the polynomial's error t90(E(t)) − t (°C).
    """

    emf_lo_mv: float
    emf_hi_mv: float
    t_lo_c: float
    t_hi_c: float
    coeffs: tuple[float, ...]
    error_lo_c: float
    error_hi_c: float

    def t90_c(self, emf_mv: float) -> float:
        """Return the plain NIST polynomial temperature in °C, without a range check."""
        return _horner(self.coeffs, emf_mv)


@dataclass(frozen=True, slots=True)
class ThermocoupleTable:
    """Everything known about one type: forward ranges, inverse ranges, limits.

    ``emf_min_mv`` and ``emf_max_mv`` are derived: E at ``t_min_c`` and at ``t_max_c``.
    ``invert_below_first_range`` says whether EMFs under the first inverse range are solved
    on the forward function (``True``) or refused (``False``, type B).
    """

    tc_type: str
    forward: tuple[ForwardRange, ...]
    inverse: tuple[InverseRange, ...]
    invert_below_first_range: bool = True
    emf_min_mv: float = field(init=False)
    emf_max_mv: float = field(init=False)

    def __post_init__(self) -> None:
        object.__setattr__(self, "emf_min_mv", self.forward[0].emf_mv(self.t_min_c))
        object.__setattr__(self, "emf_max_mv", self.forward[-1].emf_mv(self.t_max_c))

    @property
    def t_min_c(self) -> float:
        """Return the lowest temperature of the reference function in °C."""
        return self.forward[0].t_lo_c

    @property
    def t_max_c(self) -> float:
        """Return the highest temperature of the reference function in °C."""
        return self.forward[-1].t_hi_c

    @property
    def lowest_invertible_emf_mv(self) -> float:
        """Return the lowest EMF in mV (reference junction 0 °C) that can be inverted."""
        if self.invert_below_first_range:
            return min(self.emf_min_mv, self.inverse[0].emf_lo_mv)
        return self.inverse[0].emf_lo_mv

    @property
    def highest_invertible_emf_mv(self) -> float:
        """Return the highest EMF in mV (reference junction 0 °C) that can be inverted.

        That is E(t_max), or NIST's rounded upper inverse limit where that is a little higher
        (T: 20.872 mV against E(400 °C) = 20.87197 mV).
        """
        return max(self.emf_max_mv, self.inverse[-1].emf_hi_mv)


# Ranges and NIST inverse error bands: NIST SRD 60 (NIST Monograph 175).
_TABLE_LIST = (
    ThermocoupleTable(
        "B",
        forward=(
            ForwardRange(0.0, 630.615, _B_FWD_LOW),
            ForwardRange(630.615, 1820.0, _B_FWD_HIGH),
        ),
        inverse=(
            InverseRange(0.291, 2.431, 250.0, 700.0, _B_INV_1, -0.02, 0.03),
            InverseRange(2.431, 13.820, 700.0, 1820.0, _B_INV_2, -0.01, 0.02),
        ),
        invert_below_first_range=False,
    ),
    ThermocoupleTable(
        "E",
        forward=(
            ForwardRange(-270.0, 0.0, _E_FWD_LOW),
            ForwardRange(0.0, 1000.0, _E_FWD_HIGH),
        ),
        inverse=(
            InverseRange(-8.825, 0.0, -200.0, 0.0, _E_INV_1, -0.01, 0.03),
            InverseRange(0.0, 76.373, 0.0, 1000.0, _E_INV_2, -0.02, 0.02),
        ),
    ),
    ThermocoupleTable(
        "J",
        forward=(
            ForwardRange(-210.0, 760.0, _J_FWD_LOW),
            ForwardRange(760.0, 1200.0, _J_FWD_HIGH),
        ),
        inverse=(
            InverseRange(-8.095, 0.0, -210.0, 0.0, _J_INV_1, -0.05, 0.03),
            InverseRange(0.0, 42.919, 0.0, 760.0, _J_INV_2, -0.04, 0.04),
            InverseRange(42.919, 69.553, 760.0, 1200.0, _J_INV_3, -0.04, 0.03),
        ),
    ),
    ThermocoupleTable(
        "K",
        forward=(
            ForwardRange(-270.0, 0.0, _K_FWD_LOW),
            ForwardRange(0.0, 1372.0, _K_FWD_HIGH, exponential=_K_EXP),
        ),
        inverse=(
            InverseRange(-5.891, 0.0, -200.0, 0.0, _K_INV_1, -0.02, 0.04),
            InverseRange(0.0, 20.644, 0.0, 500.0, _K_INV_2, -0.05, 0.04),
            InverseRange(20.644, 54.886, 500.0, 1372.0, _K_INV_3, -0.05, 0.06),
        ),
    ),
    ThermocoupleTable(
        "N",
        forward=(
            ForwardRange(-270.0, 0.0, _N_FWD_LOW),
            ForwardRange(0.0, 1300.0, _N_FWD_HIGH),
        ),
        inverse=(
            InverseRange(-3.990, 0.0, -200.0, 0.0, _N_INV_1, -0.02, 0.03),
            InverseRange(0.0, 20.613, 0.0, 600.0, _N_INV_2, -0.02, 0.03),
            InverseRange(20.613, 47.513, 600.0, 1300.0, _N_INV_3, -0.04, 0.02),
        ),
    ),
    ThermocoupleTable(
        "R",
        forward=(
            ForwardRange(-50.0, 1064.18, _R_FWD_1),
            ForwardRange(1064.18, 1664.5, _R_FWD_2),
            ForwardRange(1664.5, 1768.1, _R_FWD_3),
        ),
        inverse=(
            InverseRange(-0.226, 1.923, -50.0, 250.0, _R_INV_1, -0.02, 0.02),
            InverseRange(1.923, 13.228, 250.0, 1200.0, _R_INV_2, -0.005, 0.005),
            InverseRange(11.361, 19.739, 1064.0, 1664.5, _R_INV_3, -0.0005, 0.001),
            InverseRange(19.739, 21.103, 1664.5, 1768.1, _R_INV_4, -0.001, 0.002),
        ),
    ),
    ThermocoupleTable(
        "S",
        forward=(
            ForwardRange(-50.0, 1064.18, _S_FWD_1),
            ForwardRange(1064.18, 1664.5, _S_FWD_2),
            ForwardRange(1664.5, 1768.1, _S_FWD_3),
        ),
        inverse=(
            InverseRange(-0.235, 1.874, -50.0, 250.0, _S_INV_1, -0.02, 0.02),
            InverseRange(1.874, 11.950, 250.0, 1200.0, _S_INV_2, -0.01, 0.01),
            InverseRange(10.332, 17.536, 1064.0, 1664.5, _S_INV_3, -0.0002, 0.0002),
            InverseRange(17.536, 18.693, 1664.5, 1768.1, _S_INV_4, -0.002, 0.002),
        ),
    ),
    ThermocoupleTable(
        "T",
        forward=(
            ForwardRange(-270.0, 0.0, _T_FWD_LOW),
            ForwardRange(0.0, 400.0, _T_FWD_HIGH),
        ),
        inverse=(
            InverseRange(-5.603, 0.0, -200.0, 0.0, _T_INV_1, -0.02, 0.04),
            InverseRange(0.0, 20.872, 0.0, 400.0, _T_INV_2, -0.03, 0.03),
        ),
    ),
)

#: The supported type letters, in alphabetical order.
TC_TYPES: tuple[str, ...] = tuple(table.tc_type for table in _TABLE_LIST)

# Keyed by both the upper- and the lower-case letter, so a lookup needs no str.upper().
_TABLES: Mapping[str, ThermocoupleTable] = MappingProxyType(
    {key: table for table in _TABLE_LIST for key in (table.tc_type, table.tc_type.lower())}
)


def _table(tc_type: str) -> ThermocoupleTable:
    try:
        return _TABLES[tc_type]
    except (KeyError, TypeError):
        known = ", ".join(TC_TYPES)
        raise ConfigError(f"unknown thermocouple type {tc_type!r}; known types: {known}") from None


def reference_table(tc_type: str) -> ThermocoupleTable:
    """Return the immutable coefficient table (ranges, coefficients, NIST bands) of a type."""
    return _table(tc_type)


# --------------------------------------------------------------------------------------------
# Forward function
# --------------------------------------------------------------------------------------------


def _range_for(table: ThermocoupleTable, t_c: float) -> ForwardRange:
    # A boundary temperature belongs to the lower range (type K: exponential only for t > 0).
    for rng in table.forward:
        if t_c <= rng.t_hi_c:
            return rng
    return table.forward[-1]


def _check_temperature(table: ThermocoupleTable, t_c: float, what: str) -> None:
    if not table.t_min_c <= t_c <= table.t_max_c:
        problem = "is not a number" if t_c != t_c else "is outside the reference range"
        raise ThermocoupleRangeError(
            f"type {table.tc_type}: {what} {t_c!r} °C {problem}; valid range is "
            f"{table.t_min_c:g} to {table.t_max_c:g} °C"
        )


def emf_mv(tc_type: str, t_c: float) -> float:
    """Return the EMF in mV at temperature ``t_c`` (°C), reference junction at 0 °C.

    Raises :class:`~drivers.errors.ThermocoupleRangeError` outside the type's range.
    """
    table = _table(tc_type)
    _check_temperature(table, t_c, "temperature")
    return _range_for(table, t_c).emf_mv(t_c)


def seebeck_uv_per_k(tc_type: str, t_c: float) -> float:
    """Return the Seebeck coefficient dE/dt in µV/K at temperature ``t_c`` (°C).

    It is the analytic derivative of the reference function. Exactly at a boundary between
    two ranges it is the mean of the two one-sided derivatives, which is what a symmetric
    difference quotient gives: the ranges meet smoothly for most types (within 1e-6 µV/K),
    but type N has a kink at 0 °C (26.159 µV/K below, 25.929 µV/K above). Raises
    :class:`~drivers.errors.ThermocoupleRangeError` outside the type's range.
    """
    table = _table(tc_type)
    _check_temperature(table, t_c, "temperature")
    forward = table.forward
    for lower, upper in itertools.pairwise(forward):
        if t_c == lower.t_hi_c:
            below = lower.emf_and_slope(t_c)[1]
            above = upper.emf_and_slope(t_c)[1]
            return 500.0 * (below + above)  # mean of the two, mV/K -> µV/K
    return 1000.0 * _range_for(table, t_c).emf_and_slope(t_c)[1]


# --------------------------------------------------------------------------------------------
# Inverse
# --------------------------------------------------------------------------------------------

#: EMFs this close (mV) outside the invertible range are still accepted: evaluating the
#: long polynomials near their range ends carries rounding noise of about 1e-12 mV, so
#: E(t) of a temperature a hair inside the range can land a hair outside. A nanovolt is far
#: below any instrument's resolution.
_EMF_LIMIT_SLACK_MV = 1e-9
#: Stop solving the forward function when E is matched this closely (mV) ...
_SOLVE_EMF_TOL_MV = 1e-10
#: ... or when the bracket around the root is this narrow (°C).
_SOLVE_T_TOL_C = 1e-10


def _solve_forward(table: ThermocoupleTable, target_mv: float, guess_c: float) -> float:
    """Return t (°C) with E(t) = target_mv, by Newton's method inside a shrinking bracket.

    E(t) rises through the whole range for every type except type B below about 21 °C, and
    type B is only solved for EMFs above 0.291 mV, whose root lies well above that dip, so
    the sign of E(t) − target tells on which side of the root t lies.
    """
    lo = table.t_min_c
    hi = table.t_max_c
    t = min(max(guess_c, lo), hi)
    while hi - lo > _SOLVE_T_TOL_C:
        e, s = _range_for(table, t).emf_and_slope(t)
        r = e - target_mv
        if abs(r) <= _SOLVE_EMF_TOL_MV:
            return t
        if r < 0.0:
            lo = t
        else:
            hi = t
        step = t - r / s if s > 0.0 else math.nan
        # A Newton step that leaves the bracket (or a NaN one) is replaced by bisection.
        t = step if lo < step < hi else 0.5 * (lo + hi)
    return t


def _emf_range_error(
    table: ThermocoupleTable, emf_meas: float, cold_junction_c: float, e_total: float
) -> ThermocoupleRangeError:
    lowest = table.lowest_invertible_emf_mv
    highest = table.highest_invertible_emf_mv
    lowest_t = table.t_min_c if table.invert_below_first_range else table.inverse[0].t_lo_c
    side = "below" if e_total < lowest else "above"
    note = ""
    if not table.invert_below_first_range and e_total < lowest:
        note = (
            f"; type {table.tc_type} is not inverted below {lowest:g} mV, where its EMF is"
            " too small and, near 0 °C, fits two temperatures"
        )
    return ThermocoupleRangeError(
        f"type {table.tc_type}: EMF {e_total:.6g} mV (measured {emf_meas!r} mV plus "
        f"{e_total - emf_meas:.6g} mV for the cold junction at {cold_junction_c!r} °C) is "
        f"{side} the invertible range {lowest:.6g} to {highest:.6g} mV "
        f"({lowest_t:g} to {table.t_max_c:g} °C){note}"
    )


def _invert(table: ThermocoupleTable, e_total: float, polish: bool) -> float:
    """Return t (°C) for an EMF already known to be invertible (reference junction 0 °C)."""
    first = table.inverse[0]
    if e_total < first.emf_lo_mv:
        return _solve_forward(table, e_total, first.t_lo_c)
    chosen = first
    for rng in table.inverse[1:]:
        # The last range starting below e_total wins. An EMF exactly on a shared limit
        # belongs to the lower range (as in NIST's own use of the tables); where ranges
        # overlap (R, S) the higher range wins, whose NIST band is the tighter.
        if rng.emf_lo_mv < e_total:
            chosen = rng
    if e_total > chosen.emf_hi_mv:
        return _solve_forward(table, e_total, chosen.t_hi_c)
    t = chosen.t90_c(e_total)
    if not polish:
        return t
    # Two Newton steps on the forward function: t ← t − (E(t) − E_total) / E'(t).
    for _ in range(2):
        e, s = _range_for(table, t).emf_and_slope(t)
        t -= (e - e_total) / s
    return min(max(t, table.t_min_c), table.t_max_c)


def temperature_c(
    tc_type: str, emf_mv: float, cold_junction_c: float = 0.0, *, polish: bool = True
) -> float:
    """Return the hot-junction temperature in °C from a measured EMF in mV.

    Cold-junction compensation is done in EMF: E_total = ``emf_mv`` + E(``cold_junction_c``),
    then t = t(E_total). With ``polish`` (the default) the NIST inverse polynomial's result is
    refined by two Newton steps on the forward function, so E(t) matches E_total to better
    than 1e-6 mV; with ``polish=False`` the plain polynomial value is returned, which is within
    NIST's band of the range (at most 0.06 °C). EMFs no polynomial covers are solved on the
    forward function (see the module docstring).

    Raises :class:`~drivers.errors.ThermocoupleRangeError` if the measured EMF is not finite,
    if the cold junction is outside the type's range, or if E_total is outside the invertible
    range (for type B that starts at 0.291 mV, about 250 °C).
    """
    table = _table(tc_type)
    if not math.isfinite(emf_mv):
        raise ThermocoupleRangeError(
            f"type {table.tc_type}: measured EMF {emf_mv!r} mV is not a finite number"
        )
    if cold_junction_c == 0.0:
        e_total = emf_mv  # E(0 °C) is exactly 0 for every type
    else:
        _check_temperature(table, cold_junction_c, "cold-junction temperature")
        e_total = emf_mv + _range_for(table, cold_junction_c).emf_mv(cold_junction_c)
    if not (
        table.lowest_invertible_emf_mv - _EMF_LIMIT_SLACK_MV
        <= e_total
        <= table.highest_invertible_emf_mv + _EMF_LIMIT_SLACK_MV
    ):
        raise _emf_range_error(table, emf_mv, cold_junction_c, e_total)
    return _invert(table, e_total, polish)


# --------------------------------------------------------------------------------------------
# Reading classifier for drivers
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class Reading:
    """A classified thermocouple reading: ``t_c`` in °C (``NaN`` for a fault), its quality,
    and a plain reason."""

    t_c: float
    quality: Quality
    reason: str

    def __post_init__(self) -> None:
        if self.quality == Quality.FAULT and not math.isnan(self.t_c):
            raise ValueError("a fault reading must carry NaN as its temperature")


def classify_emf(
    tc_type: str,
    emf_mv: float,
    cold_junction_c: float = 0.0,
    *,
    open_circuit_mv: float = DEFAULT_OPEN_CIRCUIT_MV,
) -> Reading:
    """Return a :class:`Reading` with the hot-junction temperature in °C, or a fault.

    Faults (quality ``fault``, ``t_c`` NaN, never converted): an open circuit (NaN, ±inf,
    or |EMF| above ``open_circuit_mv``, in mV), a cold-junction temperature outside the
    type's range or not a number, and an EMF that, after compensation, lies outside the
    type's invertible range (over-range). Everything else is ``ok``. An unknown type or a
    bad threshold is a configuration mistake and raises rather than classifying.
    """
    table = _table(tc_type)
    if not (open_circuit_mv > 0.0 and math.isfinite(open_circuit_mv)):
        raise ConfigError(
            f"open_circuit_mv must be a positive finite number of mV, got {open_circuit_mv!r}"
        )
    if not math.isfinite(emf_mv) or abs(emf_mv) > open_circuit_mv:
        return Reading(
            math.nan,
            Quality.FAULT,
            f"open circuit: EMF {emf_mv!r} mV is not finite or beyond ±{open_circuit_mv:g} mV",
        )
    if not table.t_min_c <= cold_junction_c <= table.t_max_c:
        return Reading(
            math.nan,
            Quality.FAULT,
            f"cold-junction temperature {cold_junction_c!r} °C is unusable for type "
            f"{table.tc_type} (valid {table.t_min_c:g} to {table.t_max_c:g} °C)",
        )
    try:
        t_c = temperature_c(table.tc_type, emf_mv, cold_junction_c)
    except ThermocoupleRangeError as exc:
        return Reading(math.nan, Quality.FAULT, f"out of range: {exc}")
    return Reading(t_c, Quality.OK, "in range")

"""Compiled arithmetic for the filter's hottest loops (numba, cached to disk).

Only plain array arithmetic lives here; what it means is documented where it is
used (:class:`monitor.estimator.FastCore`). Each kernel is checked against the
filterpy reference path by the estimator's tests, to 1e-9 on every predict and
update.

numba compiles a kernel the first time it is called in a process and keeps the
machine code in ``__pycache__`` beside this file (``cache=True``), so later
processes load it in milliseconds. Where that folder is not writable numba
compiles in memory instead (about a second, once per process); set
``NUMBA_CACHE_DIR`` to a writable folder to keep the cache elsewhere.
"""

from __future__ import annotations

import numba
import numpy as np


@numba.njit(cache=True)
def scalar_update(
    x: np.ndarray, p: np.ndarray, j: int, z: float, r: float, frozen: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Return (x⁺, P⁺) after a reading z of state j with variance r (new arrays).

    The gain is K = P[:, j] / (P_jj + r) with K_i = 0 where ``frozen[i]``, and
    P⁺ = (I - K H) P (I - K H)ᵀ + r K Kᵀ (Joseph form), which for H = e_jᵀ is
    P - K cᵀ - c Kᵀ + S K Kᵀ with c = P[:, j] and S = P_jj + r: exact for any
    gain, and written so that P⁺ is symmetric by construction.
    """
    n = x.shape[0]
    s = p[j, j] + r
    nu = z - x[j]
    c = np.empty(n)
    k = np.empty(n)
    for i in range(n):
        c[i] = p[i, j]
        k[i] = 0.0 if frozen[i] else c[i] / s
    x_new = np.empty(n)
    for i in range(n):
        x_new[i] = x[i] + k[i] * nu
    p_new = np.empty((n, n))
    for a in range(n):
        for b in range(a, n):
            value = p[a, b] - k[a] * c[b] - c[a] * k[b] + s * k[a] * k[b]
            p_new[a, b] = value
            p_new[b, a] = value
    return x_new, p_new


@numba.njit(cache=True)
def first_order_recursion(decay: float, start: float, drive: np.ndarray) -> np.ndarray:
    """Return z with z[0] = start and z[k+1] = decay·z[k] + drive[k] (length len(drive) + 1).

    The same arithmetic, in the same order, as ``scipy.signal.lfilter([1], [1, -decay],
    [start, *drive])``, without importing scipy.signal (over a second at start-up).
    """
    out = np.empty(drive.shape[0] + 1)
    value = start
    out[0] = value
    for k in range(drive.shape[0]):
        value = decay * value + drive[k]
        out[k + 1] = value
    return out

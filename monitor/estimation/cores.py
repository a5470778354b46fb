"""The filter's state layout and its two interchangeable cores: :class:`FastCore` (numpy
and the compiled update of :mod:`monitor.physics.kernels`), which the estimator runs, and
:class:`FilterpyCore` (filterpy's ``ExtendedKalmanFilter``), the reference the tests
check it against, step by step, to 1e-9."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from monitor.physics import kernels


@dataclass(frozen=True)
class Layout:
    """Where each quantity sits in the state vector (None: not in this vessel's model)."""

    water: int
    element: int | None
    lagged: int | None
    element_lagged: int | None
    ln_ua: int
    ln_c: int
    ln_g: int | None
    size: int

    @classmethod
    def build(cls, two_node: bool, lagged: bool, element_lagged: bool = False) -> Layout:
        """Return the layout for a one- or two-node model, with or without sensor lags."""
        names = ["water"] + (["element"] if two_node else []) + (["lagged"] if lagged else [])
        names += ["element_lagged"] if two_node and element_lagged else []
        names += ["ln_ua", "ln_c"] + (["ln_g"] if two_node else [])
        idx = {name: i for i, name in enumerate(names)}
        return cls(
            water=idx["water"],
            element=idx.get("element"),
            lagged=idx.get("lagged"),
            element_lagged=idx.get("element_lagged"),
            ln_ua=idx["ln_ua"],
            ln_c=idx["ln_c"],
            ln_g=idx.get("ln_g"),
            size=len(names),
        )

    @property
    def temperatures(self) -> list[int]:
        """Return the indices of the temperature states."""
        return [
            i for i in (self.water, self.element, self.lagged, self.element_lagged) if i is not None
        ]


# ---------------------------------------------------------------------------
# The filter cores: the same equations, written out (fast) and through filterpy
# ---------------------------------------------------------------------------


class FastCore:
    """EKF predict and scalar updates, in numpy and compiled kernels.

    Predict:  x⁻ = f(x),  P⁻ = F P Fᵀ + Q
    Update of one reading z of state j (H = e_jᵀ, so scalar algebra):
        ν = z - x_j,   S = P_jj + r,   K = P[:, j] / S
        x⁺ = x + K ν
        P⁺ = (I - K H) P (I - K H)ᵀ + K r Kᵀ        Joseph form, which filterpy uses
           = P - K cᵀ - c Kᵀ + S K Kᵀ,  c = P[:, j]
    The last line is exact for any gain, so it serves the consider updates too
    (some gains zeroed, where the short form P - K S Kᵀ does not hold); it runs
    compiled (:func:`monitor.physics.kernels.scalar_update`).
    """

    def __init__(self, x: np.ndarray, p: np.ndarray) -> None:
        self.x = np.array(x, dtype=float)
        self.P = np.array(p, dtype=float)
        self._masks: dict[tuple[int, ...], np.ndarray] = {}

    def predict(self, x_new: np.ndarray, f: np.ndarray, q: np.ndarray) -> None:
        """Set the prior from the propagated state and the Jacobian F."""
        self.x = x_new
        self.P = f @ self.P @ f.T + q

    def innovation(self, j: int, z: float, r: float) -> tuple[float, float]:
        """Return (ν, S) of a reading z of state j with variance r."""
        return z - self.x[j], self.P[j, j] + r

    def update(self, j: int, z: float, r: float, frozen: tuple[int, ...] = ()) -> None:
        """Apply a reading z of state j; states in ``frozen`` get zero gain (consider update)."""
        mask = self._masks.get(frozen)
        if mask is None:
            mask = np.zeros(self.x.shape[0], dtype=np.bool_)
            mask[list(frozen)] = True
            self._masks[frozen] = mask
        # x and P are always float arrays of our own making (here and in predict), so
        # they go to the kernel as they are
        self.x, self.P = kernels.scalar_update(self.x, self.P, j, float(z), float(r), mask)


class FilterpyCore:
    """The same filter through filterpy's ExtendedKalmanFilter (the reference path)."""

    def __init__(self, x: np.ndarray, p: np.ndarray) -> None:
        from filterpy.kalman import ExtendedKalmanFilter

        n = len(x)
        self._ekf = ExtendedKalmanFilter(dim_x=n, dim_z=1)
        self._ekf.x = np.array(x, dtype=float).reshape(n, 1)
        self._ekf.P = np.array(p, dtype=float)
        self._next: np.ndarray | None = None

        def predict_x(u: object = 0) -> None:
            del u
            self._ekf.x = self._next.reshape(n, 1)

        self._ekf.predict_x = predict_x

    @property
    def x(self) -> np.ndarray:
        """Return the state as a flat array."""
        return self._ekf.x.ravel()

    @property
    def P(self) -> np.ndarray:  # noqa: N802 (the filter literature's name)
        """Return the covariance."""
        return self._ekf.P

    @P.setter
    def P(self, value: np.ndarray) -> None:  # noqa: N802
        self._ekf.P = np.array(value, dtype=float)

    def predict(self, x_new: np.ndarray, f: np.ndarray, q: np.ndarray) -> None:
        """Set the prior through filterpy's predict with our F, Q and f(x)."""
        self._next = np.array(x_new, dtype=float)
        self._ekf.F = f
        self._ekf.Q = q
        self._ekf.predict()

    def innovation(self, j: int, z: float, r: float) -> tuple[float, float]:
        """Return (ν, S) of a reading z of state j with variance r."""
        return z - float(self._ekf.x[j, 0]), float(self._ekf.P[j, j]) + r

    def update(self, j: int, z: float, r: float, frozen: tuple[int, ...] = ()) -> None:
        """Apply a reading through filterpy's EKF update (no consider update there)."""
        if frozen:
            raise NotImplementedError("the filterpy path has no consider update")
        n = len(self.x)
        h = np.zeros((1, n))
        h[0, j] = 1.0
        self._ekf.update(
            np.array([z]), HJacobian=lambda _x: h, Hx=lambda x: x[j : j + 1], R=np.array([[r]])
        )


# ---------------------------------------------------------------------------
# The vessel estimator
# ---------------------------------------------------------------------------

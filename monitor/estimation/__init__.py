"""Estimation: the per-vessel Kalman filter, the heat-up batch fit and what they hand on
(``contracts``). Builds on :mod:`monitor.physics` only."""

"""Every component id of the board, in one place (views import them from here)."""

from __future__ import annotations

STORE = "board-store"
POLL = "board-poll"
VESSEL_PICK = "vessel-pick"
VESSEL_FIGURES = "vessel-figures"
VESSEL_FLAGS = "vessel-flags"
VESSEL_READINGS = "vessel-readings-chart"
VESSEL_ESTIMATES = "vessel-estimates-chart"
FLEET_TABLE = "fleet-table"
LOG_NAME = "log-name"
MAINT_PICK = "maintenance-pick"
MAINT_CHART = "maintenance-chart"
MAINT_REPORTS = "maintenance-reports"

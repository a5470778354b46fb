"""Simulated vessels as MQTT ``reading`` payloads, for the engine's tests and benchmark.

Each instant of a simulated kettle (:class:`drivers.simworld.SimulatedRig`) becomes one
``reading`` JSON object with its own ``t`` (docs/mqtt.md); a fault reading (NaN) is
left out, as an instrument that has no value sends none. The same vessel id and seed
give the same payloads, byte for byte.
"""

from __future__ import annotations

import json
import math
from dataclasses import replace
from pathlib import Path

from drivers.payloads import CHANNEL_COLUMNS
from drivers.sample import Quality
from drivers.simworld import SimulatedRig, kettle_scenario, scenario_metadata
from monitor.rig.config import VesselSpec, load_config

#: The simulated kettles' start (Unix s): 2026-12-01T00:00:00Z, so stream time stamps
#: (now) are after every reading's ``t`` and the plausibility bound never refuses one.
START_EPOCH_S = 1_764_547_200.0


def kettle_readings(vessel: str, seed: int, duration_s: float = 900.0,
                    start_epoch_s: float = START_EPOCH_S) -> list[bytes]:  # fmt: skip
    """Return one simulated kettle's ``reading`` payloads, oldest first."""
    scenario = replace(kettle_scenario(), vessel=vessel, duration_s=duration_s,
                       start_epoch_s=start_epoch_s)  # fmt: skip
    payloads: list[bytes] = []
    for instant in SimulatedRig(scenario, seed=seed).run():
        good = [s for s in instant if s.quality != Quality.FAULT and math.isfinite(s.value)]
        good = [s for s in good if s.channel in CHANNEL_COLUMNS]
        if not good:
            continue
        body: dict[str, float] = {"t": good[0].t}
        for sample in good:
            body[CHANNEL_COLUMNS[sample.channel]] = sample.value
        payloads.append(json.dumps(body).encode())
    return payloads


def two_kettle_runs(vessel: str, seed: int) -> list[bytes]:
    """Return a kettle's 300 s heat-up, then another an hour later: two runs, since the
    gap is past the run splitter's 900 s."""
    first = kettle_readings(vessel, seed=seed, duration_s=300.0)
    later = kettle_readings(vessel, seed=seed + 50, duration_s=300.0,
                            start_epoch_s=START_EPOCH_S + 3600.0)  # fmt: skip
    return first + later


def kettle_spec(vessel: str, seed: int, duration_s: float = 900.0,
                start_epoch_s: float = START_EPOCH_S) -> VesselSpec:  # fmt: skip
    """Return the configured vessel that :func:`kettle_readings` simulates."""
    scenario = replace(kettle_scenario(), vessel=vessel, duration_s=duration_s,
                       start_epoch_s=start_epoch_s)  # fmt: skip
    meta = scenario_metadata(scenario, seed)
    return VesselSpec(vessel, {**meta, "element_sensor": "yes"}, has_element_sensor=True,
                      via_mqtt=True)  # fmt: skip


def fleet_config(vessels: list[str], mqtt_port: int, prefix: str = "ebullio") -> str:
    """Return a rig configuration (TOML) of simulated kettles that publish over MQTT."""
    lines = ["[mqtt]", f'url = "mqtt://127.0.0.1:{mqtt_port}"', f'prefix = "{prefix}"', ""]
    for vessel in vessels:
        lines += [
            "[[vessels]]",
            f'id = "{vessel}"',
            "vessel_heat_capacity_j_per_k = 420",  # the kettle scenario's shell and element
            "element_heat_capacity_j_per_k = 160",
            "rated_power_w = 2200",
            "nominal_volume_l = 1.7",
            "element_sensor = true",
            "",
        ]
    return "\n".join(lines)


def fleet_specs(folder: Path, vessels: list[str], mqtt_port: int) -> dict[str, VesselSpec]:
    """Write :func:`fleet_config` as ``folder/fleet.toml`` and return its vessels' specs."""
    path = Path(folder) / "fleet.toml"
    path.write_text(fleet_config(vessels, mqtt_port))
    return {v.id: v for v in load_config(path).vessels}

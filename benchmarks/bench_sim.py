"""Print JSON: how fast the simulated rig and the model's exact steps run on this machine.

.venv/bin/python benchmarks/bench_sim.py
"""

from __future__ import annotations

import json
import platform
import time
import timeit

from drivers.simworld import SimulatedRig, kettle_scenario, water_heater_scenario
from monitor.physics import model


def _sim_rate(scenario) -> dict[str, float]:
    rig = SimulatedRig(scenario, seed=1)
    started = time.process_time()
    rows = sum(1 for _ in rig.run())
    cpu_s = time.process_time() - started
    e = rig.energy_balance_j()
    closure = (e["in"] - e["lost"] - e["latent"] - e["drawn"] - e["stored"]) / e["in"]
    return {
        "simulated_s": scenario.duration_s,
        "rows": rows,
        "cpu_s": round(cpu_s, 3),
        "simulated_s_per_cpu_s": round(scenario.duration_s / cpu_s, 1),
        "substep_s": round(rig.substep_s, 4),
        "energy_closure_relative": closure,
    }


def _us_per_call(fn, number: int = 20000) -> float:
    return round(min(timeit.repeat(fn, number=number, repeat=3)) / number * 1e6, 3)


def main() -> None:
    one = model.VesselParams(ua_w_per_k=0.65, heat_capacity_j_per_k=5440.0)
    two = model.VesselParams(0.65, 5280.0, 54.0, 160.0)
    heat = model.Inputs(power_w=2200.0, ambient_c=21.0, boiling_point_c=99.97)
    result = {
        "python": platform.python_version(),
        "machine": platform.machine(),
        "sim_kettle_900s": _sim_rate(kettle_scenario()),
        "sim_water_heater_12h": _sim_rate(water_heater_scenario()),
        "model_us_per_call": {
            "step_one_node": _us_per_call(lambda: model.step_one_node(50.0, 1.0, heat, one)),
            "step_two_node": _us_per_call(
                lambda: model.step_two_node((50.0, 80.0), 1.0, heat, two), number=2000
            ),
            "time_to_target_one_node": _us_per_call(
                lambda: model.time_to_target((15.0,), 99.97, heat, one)
            ),
            "time_to_target_two_node": _us_per_call(
                lambda: model.time_to_target((15.0, 15.0), 99.97, heat, two), number=100
            ),
        },
    }
    print(json.dumps(result, indent=2))


if __name__ == "__main__":
    main()

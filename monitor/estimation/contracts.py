"""What the estimator hands on: estimates, forecasts and flags (docs/mqtt.md, docs/run-summary.md).

Small frozen objects with units in their names. Boards, reports, replay and the
MQTT publisher all read these and nothing else of the estimator.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field
from enum import StrEnum
from typing import TypeVar

_C = TypeVar("_C", bound=type)


def quick_init(cls: _C) -> _C:
    """Give a frozen, slotted dataclass an ``__init__`` that fills its slots through
    their descriptors: the same signature and the same object, made in about half the
    time (the generated one calls ``object.__setattr__`` once per field, to get past
    the freeze; a replay makes an :class:`Estimate` and several :class:`Estimated` a
    step). Assigning to a field afterwards still raises ``FrozenInstanceError``.
    """
    fields = dataclasses.fields(cls)
    scope: dict[str, object] = {"_MISSING": dataclasses.MISSING}
    params, lines = [], []
    for f in fields:
        scope[f"_set_{f.name}"] = cls.__dict__[f.name].__set__
        if f.default is not dataclasses.MISSING:
            scope[f"_default_{f.name}"] = f.default
            params.append(f"{f.name}=_default_{f.name}")
        elif f.default_factory is not dataclasses.MISSING:
            scope[f"_factory_{f.name}"] = f.default_factory
            params.append(f"{f.name}=_MISSING")
            lines.append(f"    if {f.name} is _MISSING: {f.name} = _factory_{f.name}()")
        else:
            params.append(f.name)
        lines.append(f"    _set_{f.name}(self, {f.name})")
    source = f"def __init__(self, {', '.join(params)}):\n" + "\n".join(lines) + "\n"
    exec(source, scope)  # our own fields' names, checked by dataclasses
    init = scope["__init__"]
    init.__qualname__ = f"{cls.__qualname__}.__init__"  # type: ignore[attr-defined]
    cls.__init__ = init  # type: ignore[misc]
    return cls


class Phase(StrEnum):
    """What the vessel is doing."""

    IDLE = "idle"  # no power, near room temperature
    HEATING = "heating"  # power on, below the target
    HOLDING = "holding"  # a thermostat keeping the water near its setpoint
    BOILING = "boiling"  # at the boiling point with heat still going in
    COOLING = "cooling"  # no power, above room temperature


class Level(StrEnum):
    """How urgent a flag is."""

    NOTICE = "notice"
    WARNING = "warning"
    ALARM = "alarm"


@quick_init
@dataclass(frozen=True, slots=True)
class Flag:
    """A named condition, its level, the numbers behind it and one sentence for the operator."""

    name: str
    level: Level
    message: str
    evidence: dict[str, float] = field(default_factory=dict)

    def as_dict(self) -> dict[str, object]:
        """Return the flag as a JSON-ready dict."""
        return {
            "name": self.name,
            "level": str(self.level),
            "message": self.message,
            "evidence": dict(self.evidence),
        }


@quick_init
@dataclass(frozen=True, slots=True)
class Estimated:
    """A value with its standard deviation, in the unit its name carries."""

    value: float
    std: float

    def as_dict(self) -> dict[str, float]:
        """Return ``{"value", "std"}`` for JSON."""
        return {"value": self.value, "std": self.std}


@quick_init
@dataclass(frozen=True, slots=True)
class TargetForecast:
    """Time for the water to reach ``target_c``, s from now, with a 90 % interval.

    ``eta_s`` is None when the target is not reachable at present power; ``reason``
    then says why. ``hi_s`` is None when part of the interval never reaches it.
    """

    target_c: float
    eta_s: float | None
    lo_s: float | None
    hi_s: float | None
    reason: str = ""

    @property
    def reachable(self) -> bool:
        """Return True when the most likely parameters reach the target."""
        return self.eta_s is not None


@quick_init
@dataclass(frozen=True, slots=True)
class Estimate:
    """The filter's view of one vessel at one instant (temperatures °C, time s)."""

    t_s: float
    vessel: str
    phase: Phase
    water_c: float
    water_std_c: float
    element_c: float | None
    ambient_c: float
    power_w: float
    ua_w_per_k: Estimated
    heat_capacity_j_per_k: Estimated
    water_mass_kg: Estimated | None
    element_conductance_w_per_k: Estimated | None
    boiling_point_c: float
    target: TargetForecast | None
    boil_off_to_dry_s: float | None
    evaporation_kg_per_s: float
    standing_loss_w: Estimated | None
    nis: float | None
    flags: tuple[Flag, ...] = ()


def finite_or_none(value: float | None) -> float | None:
    """Return ``value`` unless it is None or not finite (then None), for JSON output."""
    if value is None or not math.isfinite(value):
        return None
    return value

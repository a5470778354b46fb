"""The one mapping from what the estimator hands on to the forms ebullio publishes and stores.

An estimate has one flat form, :func:`flatten_estimate`: a dict of JSON values whose
keys carry their unit. It holds ``t``, ``vessel``, ``run`` (the run's label, text),
``phase``, one key per entry of :data:`ESTIMATE_FIELDS` (None where the figure is not
known or not finite) and ``flags``. Every other form is that dict, cut differently,
with the same names and the same values:

* the MQTT message on ``<prefix>/<vessel>/estimate`` is the flat form itself
  (docs/mqtt.md);
* a row of the recorder's ``estimates`` table keeps ``t``, ``vessel``, ``phase`` and the
  fields marked ``column`` (:data:`ESTIMATE_COLUMNS`) in REAL columns of their own, and
  every other key under its own name in the row's ``detail`` JSON
  (:func:`split_estimate`); reading a row back gives the flat form again
  (:func:`join_estimate`; docs/recorder.md);
* ``ebullio replay --estimates FILE`` writes :data:`ESTIMATE_CSV_COLUMNS`: ``t`` as
  ``time_s`` (seconds from the log's start, the replay's clock), ``vessel``, ``run``,
  ``phase`` and the column fields, as text (:func:`estimate_csv_row`);
* the board draws the flat form as the recorder gives it back, or as a replay makes it.

A flag raised on a vessel is stored as :func:`flag_record` gives it; its MQTT form (the
``flags`` topic, and ``flags`` in an estimate) is :meth:`monitor.estimation.contracts.Flag.as_dict`,
the same without ``t`` and ``vessel``.

Pure: nothing here touches a file, a socket or the clock.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass

from monitor.estimation.contracts import Estimate, Estimated, Flag

__all__ = [
    "ESTIMATE_COLUMNS",
    "ESTIMATE_CSV_COLUMNS",
    "ESTIMATE_FIELDS",
    "ESTIMATE_KEYS",
    "EstimateField",
    "csv_number",
    "estimate_csv_row",
    "flag_record",
    "flatten_estimate",
    "join_estimate",
    "split_estimate",
]


@dataclass(frozen=True, slots=True)
class EstimateField:
    """One figure of an estimate: its name in every form, its unit, and how it is read.

    ``unit`` is the figure's unit as written in docs/mqtt.md (``1`` for a pure number,
    ``text`` for a sentence).

    ``read`` returns the figure from an :class:`~monitor.estimation.contracts.Estimate` as a
    float, or None when it is not known or not finite (a text field returns a str).
    ``column`` is True for a figure with a REAL column of its own in the recorder's
    ``estimates`` table and in the ``--estimates`` CSV; the others are kept in the
    row's ``detail`` JSON.
    """

    name: str
    unit: str
    read: Callable[[Estimate], float | str | None]
    column: bool = False


def _finite(value: float | None) -> float | None:
    """Return ``value`` as a float, or None when it is None or not finite."""
    if value is None:
        return None
    value = float(value)
    return value if math.isfinite(value) else None


def _plain(attribute: str) -> Callable[[Estimate], float | None]:
    def read(e: Estimate) -> float | None:
        return _finite(getattr(e, attribute))

    return read


def _value(attribute: str) -> Callable[[Estimate], float | None]:
    def read(e: Estimate) -> float | None:
        estimated: Estimated | None = getattr(e, attribute)
        return None if estimated is None else _finite(estimated.value)

    return read


def _std(attribute: str) -> Callable[[Estimate], float | None]:
    def read(e: Estimate) -> float | None:
        estimated: Estimated | None = getattr(e, attribute)
        return None if estimated is None else _finite(estimated.std)

    return read


def _target(attribute: str) -> Callable[[Estimate], float | None]:
    def read(e: Estimate) -> float | None:
        return None if e.target is None else _finite(getattr(e.target, attribute))

    return read


def _target_reason(e: Estimate) -> str:
    return e.target.reason if e.target is not None else ""


#: Every figure of an estimate, in the order the MQTT message lists them (docs/mqtt.md
#: says what each means). The ``column`` ones keep their order in the recorder's table
#: and in the CSV.
ESTIMATE_FIELDS: tuple[EstimateField, ...] = (
    EstimateField("water_c", "°C", _plain("water_c"), column=True),
    EstimateField("water_std_c", "K", _plain("water_std_c")),
    EstimateField("element_c", "°C", _plain("element_c")),
    EstimateField("ambient_c", "°C", _plain("ambient_c")),
    EstimateField("power_w", "W", _plain("power_w")),
    EstimateField("water_mass_kg", "kg", _value("water_mass_kg"), column=True),
    EstimateField("water_mass_std", "kg", _std("water_mass_kg"), column=True),
    EstimateField("heat_capacity_j_per_k", "J/K", _value("heat_capacity_j_per_k"), column=True),
    EstimateField("heat_capacity_std", "J/K", _std("heat_capacity_j_per_k"), column=True),
    EstimateField("ua_w_per_k", "W/K", _value("ua_w_per_k"), column=True),
    EstimateField("ua_std", "W/K", _std("ua_w_per_k"), column=True),
    EstimateField(
        "element_conductance_w_per_k", "W/K", _value("element_conductance_w_per_k"), column=True
    ),
    EstimateField(
        "element_conductance_std", "W/K", _std("element_conductance_w_per_k"), column=True
    ),
    EstimateField("standing_loss_w", "W", _value("standing_loss_w")),
    EstimateField("standing_loss_std", "W", _std("standing_loss_w")),
    EstimateField("boiling_point_c", "°C", _plain("boiling_point_c")),
    EstimateField("target_c", "°C", _target("target_c"), column=True),
    EstimateField("time_to_target_s", "s", _target("eta_s"), column=True),
    EstimateField("time_to_target_lo_s", "s", _target("lo_s"), column=True),
    EstimateField("time_to_target_hi_s", "s", _target("hi_s"), column=True),
    EstimateField("target_reason", "text", _target_reason),
    EstimateField("boil_off_to_dry_s", "s", _plain("boil_off_to_dry_s")),
    EstimateField("evaporation_kg_per_s", "kg/s", _plain("evaporation_kg_per_s")),
    EstimateField("nis", "1", _plain("nis"), column=True),
)

#: The fields with a REAL column of their own in the ``estimates`` table (and the CSV).
ESTIMATE_COLUMNS: tuple[str, ...] = tuple(f.name for f in ESTIMATE_FIELDS if f.column)
#: Every key of the flat form, in its order.
ESTIMATE_KEYS: tuple[str, ...] = (
    "t", "vessel", "run", "phase", *(f.name for f in ESTIMATE_FIELDS), "flags",
)  # fmt: skip
#: The header of ``ebullio replay --estimates FILE``: ``t`` is written as ``time_s``.
ESTIMATE_CSV_COLUMNS: tuple[str, ...] = ("time_s", "vessel", "run", "phase", *ESTIMATE_COLUMNS)
#: Keys of the flat form stored in columns of their own (the rest go in ``detail``).
_ROW_KEYS = frozenset({"t", "vessel", "phase", *ESTIMATE_COLUMNS})


def flatten_estimate(e: Estimate, *, vessel: str, run: str, t: float) -> dict[str, object]:
    """Return an estimate in its one flat form (every key of :data:`ESTIMATE_KEYS`).

    ``t`` is the estimate's time: Unix s live, the replay's clock in a replay.
    ``run`` is the run's label. Figures that are not known or not finite are None.
    """
    record: dict[str, object] = {"t": t, "vessel": vessel, "run": run, "phase": str(e.phase)}
    for field in ESTIMATE_FIELDS:
        record[field.name] = field.read(e)
    record["flags"] = [f.as_dict() for f in e.flags]
    return record


def split_estimate(record: Mapping[str, object]) -> tuple[list[object], dict[str, object]]:
    """Return a flat estimate as the recorder stores it: column values and ``detail``.

    The values are those of :data:`ESTIMATE_COLUMNS` in order (None where absent);
    ``detail`` holds every key besides ``t``, ``vessel``, ``phase`` and the columns.
    Raises ValueError naming any key the flat form does not have.
    """
    unknown = sorted(set(record) - set(ESTIMATE_KEYS))
    if unknown:
        raise ValueError(f"estimate has unknown keys {unknown}; known keys: {list(ESTIMATE_KEYS)}")
    columns = [record.get(c) for c in ESTIMATE_COLUMNS]
    detail = {k: v for k, v in record.items() if k not in _ROW_KEYS}
    return columns, detail


def join_estimate(row: Mapping[str, object], detail: Mapping[str, object]) -> dict[str, object]:
    """Return a stored estimate in its flat form: ``detail``'s keys, then ``row``'s columns.

    ``row`` maps column names to values (``t``, ``vessel``, ``phase``, the fields and
    whatever else the reader selected, such as ``id``). A log written before this
    mapping kept the standing loss as ``{"value", "std"}`` and the run as a number in
    ``detail``; those are read as ``standing_loss_w``, ``standing_loss_std`` and the
    run's label.
    """
    flat = dict(detail)
    loss = flat.get("standing_loss_w")
    if isinstance(loss, Mapping):
        flat["standing_loss_w"] = loss.get("value")
        flat.setdefault("standing_loss_std", loss.get("std"))
    run = flat.get("run")
    if isinstance(run, int) and not isinstance(run, bool):
        flat["run"] = str(run)
    flat.update(row)
    return flat


def csv_number(value: object) -> str:
    """Return a number as the ``--estimates`` CSV writes it: rounded to 6 decimal places,
    empty when None or not finite."""
    if value is None:
        return ""
    number = float(value)  # type: ignore[arg-type]
    return repr(round(number, 6)) if math.isfinite(number) else ""


def estimate_csv_row(record: Mapping[str, object]) -> list[str]:
    """Return a flat estimate as one ``--estimates`` CSV row (:data:`ESTIMATE_CSV_COLUMNS`)."""
    return [
        csv_number(record["t"]), str(record["vessel"]), str(record["run"]), str(record["phase"]),
        *(csv_number(record.get(c)) for c in ESTIMATE_COLUMNS),
    ]  # fmt: skip


def flag_record(t: float, vessel: str, flag: Flag) -> dict[str, object]:
    """Return a :class:`~monitor.estimation.contracts.Flag` raised at ``t`` (Unix s) on
    ``vessel`` as the recorder's ``flags`` row: ``t``, ``vessel``, ``name``, ``level``, ``message``,
    ``evidence``."""
    return {"t": t, "vessel": vessel, **flag.as_dict()}


def run_record(summary: Mapping[str, object]) -> dict[str, object]:
    """Return the ``runs`` row of a run summary (docs/run-summary.md), live or replayed:
    the vessel, the run's label, its first and last step (Unix s) and the summary."""
    start_t = summary.get("start_t")
    return {"vessel": str(summary["vessel"]), "run": str(summary["run"]),
            "start_t": float(start_t) if isinstance(start_t, int | float) else 0.0,
            "end_t": summary.get("end_t"), "summary": dict(summary)}  # fmt: skip

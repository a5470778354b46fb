"""The estimator's contracts are made by a quick ``__init__`` (issue 16: a replay makes an
Estimate and several Estimated a step); they must stay what the dataclass made them."""

from __future__ import annotations

import dataclasses

import pytest

from monitor.estimation.contracts import (
    Estimate,
    Estimated,
    Flag,
    Level,
    Phase,
    TargetForecast,
    quick_init,
)


def _generated(cls: type) -> type:
    """The same fields in a plain frozen, slotted dataclass (its generated ``__init__``)."""
    fields = [(f.name, f.type, f) for f in dataclasses.fields(cls)]
    return dataclasses.make_dataclass(f"Plain{cls.__name__}", fields, frozen=True, slots=True)


@pytest.mark.parametrize("cls", [Flag, Estimated, TargetForecast, Estimate])
def test_a_quick_init_sets_what_the_generated_one_sets(cls) -> None:
    plain = _generated(cls)
    values = {f.name: object() for f in dataclasses.fields(cls)}
    ours, theirs = cls(**values), plain(**values)
    assert all(getattr(ours, k) is getattr(theirs, k) is v for k, v in values.items())
    positional = cls(*values.values())
    assert dataclasses.asdict(positional).keys() == values.keys()
    with pytest.raises(dataclasses.FrozenInstanceError):
        ours.__setattr__(next(iter(values)), 1.0)
    with pytest.raises(TypeError):
        cls()  # the required fields are still required


def test_defaults_and_factories_are_kept() -> None:
    a, b = Flag("x", Level.NOTICE, "m"), Flag("y", Level.ALARM, "n")
    assert a.evidence == {}
    assert b.evidence == {}
    assert a.evidence is not b.evidence  # a fresh dict each, as field(default_factory=dict)
    assert TargetForecast(60.0, None, None, None).reason == ""
    e = Estimate(0.0, "k", Phase.IDLE, 20.0, 0.1, None, 20.0, 0.0, Estimated(1.0, 0.1),
                 Estimated(2.0, 0.1), None, None, 100.0, None, None, 0.0, None, None)  # fmt: skip
    assert e.flags == ()
    assert dataclasses.replace(e, flags=(a,)).flags == (a,)
    assert Estimated(1.0, 2.0) == Estimated(1.0, 2.0)
    assert hash(Estimated(1.0, 2.0)) == hash(Estimated(1.0, 2.0))


def test_quick_init_on_a_class_of_its_own() -> None:
    @quick_init
    @dataclasses.dataclass(frozen=True, slots=True)
    class Pair:
        left: float
        right: list = dataclasses.field(default_factory=list)

    assert Pair(1.0).right == []
    assert Pair(1.0, [2]).right == [2]
    assert Pair.__init__.__qualname__.endswith("Pair.__init__")

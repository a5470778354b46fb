"""Shared fixtures: real Mosquitto brokers on 127.0.0.1 (driver and service tests)."""

from __future__ import annotations

from collections.abc import Iterator

import pytest

from drivers.emulators.mosquitto import MosquittoBroker

#: The one account of the password-protected broker (test values, no source).
AUTH_USER = "meter-1"
AUTH_PASSWORD = "kettle:pass@word"  # ':' and '@' on purpose, to test URL quoting


@pytest.fixture
def mosquitto(tmp_path) -> Iterator[MosquittoBroker]:
    """Yield a running anonymous broker, stopped after the test."""
    with MosquittoBroker(tmp_path / "mosquitto") as broker:
        yield broker


@pytest.fixture
def mosquitto_auth(tmp_path) -> Iterator[MosquittoBroker]:
    """Yield a running broker that takes only AUTH_USER with AUTH_PASSWORD."""
    with MosquittoBroker(tmp_path / "mosquitto-auth", users={AUTH_USER: AUTH_PASSWORD}) as broker:
        yield broker


@pytest.fixture
def mosquitto_persistent(tmp_path) -> Iterator[MosquittoBroker]:
    """Yield a running anonymous broker that keeps sessions across a stop and start."""
    with MosquittoBroker(tmp_path / "mosquitto-persistent", persistence=True) as broker:
        yield broker

"""Shared fixtures: the shipped profile, model histories, and a real broker per test."""

from __future__ import annotations

import numpy as np
import pytest

from tests.broker import Broker
from tests.service_harness import RUNNING
from watcher.files.profiles import load_profile
from watcher.model.integrator import Spec, advance, new_state, outputs


@pytest.fixture(scope="session")
def dairy():
    return load_profile(None)


def run_history(spec: Spec, time_ts, air_c, setpoint_c=None, probe_c=None, chunks=None):
    """Integrate one or more zones (air_c (Z, K) or (K,)) and return (state, outputs)."""
    t = np.asarray(time_ts, dtype=float)
    air = np.atleast_2d(np.asarray(air_c, dtype=float))
    probe = None if probe_c is None else np.atleast_2d(np.asarray(probe_c, dtype=float))
    sp = air[:, 0] if setpoint_c is None else setpoint_c
    state = new_state(spec, t[0], air[:, 0], sp, None if probe is None else probe[:, 0])
    bounds = [1, t.size] if chunks is None else chunks
    for lo, hi in zip(bounds[:-1], bounds[1:]):
        state, _ = advance(spec, state, t[lo:hi], air[:, lo:hi], None if probe is None else probe[:, lo:hi])
    return state, outputs(spec, state)


_RATES: list[tuple[str, float, float]] = []


def record_rate(label: str, detection: float, false_per_day: float) -> None:
    """Keep a detector's measured rates for the summary printed at the end of the run."""
    _RATES.append((label, detection, false_per_day))


def pytest_terminal_summary(terminalreporter):
    if _RATES:
        terminalreporter.section("event detection rates (synthetic series, tests/test_events.py)")
        for label, det, false in _RATES:
            terminalreporter.write_line(f"{label}: detection {100 * det:.0f} %, false alarms {false:.2f} per day")


@pytest.fixture()
def broker(tmp_path):
    b = Broker(tmp_path)
    b.start()
    yield b
    for proc in RUNNING:  # never leave a watcher behind, whatever the test did
        if proc.poll() is None:
            proc.kill()
            proc.wait(10)
    RUNNING.clear()
    b.stop()


@pytest.fixture(scope="session")
def pg_server():
    """One real PostgreSQL server for the session (tests/pgserver.py); each test that needs a
    record makes its own database on it."""
    from tests.pgserver import PostgresServer

    server = PostgresServer()
    try:
        server.start()
        yield server
    finally:
        server.stop()


_DATABASES = iter(range(1, 1 << 30))


@pytest.fixture()
def pg_record(pg_server):
    """(url, password) of a new, empty database for a watcher record."""
    return pg_server.new_database(f"record_{next(_DATABASES)}"), pg_server.password

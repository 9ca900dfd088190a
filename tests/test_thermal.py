"""Product temperature lag: exact first-order response, any step size, long series."""

import math

import numpy as np
import pytest

from tests.conftest import run_history
from watcher.model.integrator import Position, Spec
from watcher.model.thermal import lag_series, lag_step


def analytic_pulse(time_ts, base_c, rise_k, start_ts, length_s, tau_s):
    """First-order response to a rectangular air pulse [derived: solution of dT/dt = (A - T)/tau]."""
    t = np.asarray(time_ts, dtype=float)
    out = np.full(t.shape, base_c)
    on = (t > start_ts) & (t <= start_ts + length_s)
    out[on] = base_c + rise_k * (1 - np.exp(-(t[on] - start_ts) / tau_s))
    peak = rise_k * (1 - math.exp(-length_s / tau_s))
    off = t > start_ts + length_s
    out[off] = base_c + peak * np.exp(-(t[off] - start_ts - length_s) / tau_s)
    return out


def test_lag_matches_analytic_response_to_30_min_8_k_pulse():
    """A 30-min, +8 K air pulse at -25 C: lag_series equals the analytic response (tau 1 h and 8 h)."""
    dt = np.full(600, 60.0)
    t = np.concatenate(([0.0], np.cumsum(dt)))
    air = np.where((t[:-1] >= 3600) & (t[:-1] < 5400), -17.0, -25.0)
    for tau in (3600.0, 8 * 3600.0):
        path = lag_series(np.array([-25.0]), air[None, :], dt, tau)[0]
        assert np.max(np.abs(path - analytic_pulse(t, -25.0, 8.0, 3600, 1800, tau))) < 1e-9


def test_integrator_product_temperature_follows_the_pulse():
    """The integrator's per-position product temperature equals the analytic pulse response."""
    from watcher.files.profiles import load_profile

    spec = Spec(load_profile(None), (Position("pack", 3600.0), Position("core", 28800.0)))
    t = np.arange(0.0, 3 * 3600 + 1, 60.0)
    air = np.where((t >= 3600) & (t < 5400), -17.0, -25.0)
    for end in (4500.0, 5400.0, 7200.0, 10800.0):
        k = int(end // 60)
        _, out = run_history(spec, t[: k + 1], air[: k + 1], setpoint_c=-25.0)
        for i, tau in enumerate((3600.0, 28800.0)):
            expect = analytic_pulse([end], -25.0, 8.0, 3600, 1800, tau)[0]
            assert out["product_c"][0, i] == pytest.approx(expect, abs=1e-9)


def test_lag_is_exact_for_any_step():
    """One 2-hour step of held air equals 120 one-minute steps (exact for piecewise-constant input)."""
    one = lag_step(-25.0, -15.0, 7200.0, 3600.0)
    path = lag_series(np.array([-25.0]), np.full((1, 120), -15.0), np.full(120, 60.0), 3600.0)
    assert path[0, -1] == pytest.approx(one, abs=1e-12)


def test_lag_series_survives_long_series_without_underflow():
    """A year of minutes with tau 1 h (decay sum ~ 8760) stays finite and settles on the air value."""
    n = 525_600
    path = lag_series(np.array([-30.0]), np.full((1, n), -20.0), np.full(n, 60.0), 3600.0)
    assert np.all(np.isfinite(path))
    assert path[0, -1] == pytest.approx(-20.0, abs=1e-9)

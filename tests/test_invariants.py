"""Property-based invariants of the model (hypothesis)."""

import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tests.conftest import run_history
from watcher.files.profiles import load_profile
from watcher.model import population as pop
from watcher.model.integrator import Spec, advance, new_state, outputs

DAIRY = load_profile(None)
SPEC = Spec(DAIRY)
FAST = settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])

levels = st.lists(st.floats(-34.0, -6.0, allow_nan=False), min_size=2, max_size=12)
durations = st.lists(st.integers(1, 48), min_size=2, max_size=12)


def piecewise(levels_c, hours, step_s):
    """A piecewise-constant air history from levels held for whole hours."""
    n = min(len(levels_c), len(hours))
    per_level = [int(h * 3600 / step_s) for h in hours[:n]]
    air = np.repeat(np.array(levels_c[:n]), per_level)
    t = 1_750_000_000.0 + step_s * np.arange(air.size)
    return t, air


@FAST
@given(
    shape=st.sampled_from(["gamma", "lsw"]),
    cv=st.floats(0.1, 0.8),
    mean=st.floats(5.0, 200.0),
    theta_rel=st.floats(1e-4, 5.0),
)
def test_isothermal_step_conserves_volume(shape, cv, mean, theta_rel):
    """Any isothermal coarsening step keeps the ice volume (1e-12) and the class order."""
    ub, w = pop.initial_cells(mean, cv, shape, 64)
    u, n = ub[None].copy(), (w / pop.volume(ub[None], w[None])[0] * 0.5)[None].copy()
    pop.lsw_advance(u, n, np.array([theta_rel * mean**3]), 0.02)
    assert abs(pop.volume(u, n)[0] - 0.5) <= 1e-12
    assert np.all(np.diff(u[0]) >= 0)


@FAST
@given(levels=levels, hours=durations)
def test_sizes_never_negative_and_budget_never_decreases(levels, hours):
    """Through any frozen history fed in pieces: sizes stay positive, the budget never falls."""
    t, air = piecewise(levels, hours, 600.0)
    if t.size < 3:
        return
    state = new_state(SPEC, t[0], air[0], -25.0)
    last = np.zeros(len(SPEC.positions))
    for lo in range(1, t.size, max(1, t.size // 7)):
        hi = min(t.size, lo + max(1, t.size // 7))
        state, _ = advance(SPEC, state, t[lo:hi], air[None, lo:hi])
        out = outputs(SPEC, state)
        assert np.all(out["mean_diameter_um"] > 0) and np.all(out["d90_um"] > 0)
        a, b, n_eff, _ = pop._cell_parts(state.ub, state.nc)
        assert np.all(a >= 0) and np.all(b >= a) and np.all(n_eff >= 0)
        assert np.all(out["budget_used_pct"] >= last - 1e-12)
        last = out["budget_used_pct"][0]


@FAST
@given(levels=levels, hours=durations)
def test_two_half_steps_equal_one_step_for_any_history(levels, hours):
    """Splitting every sample interval in two (same held values) changes nothing beyond 1e-5.

    The only difference is Simpson's rule on 20-min versus 10-min panels of the product-lag
    curve; at -6 C with tau 1 h that quadrature error reaches about 1.5e-6 of the budget.
    """
    t, air = piecewise(levels, hours, 1200.0)
    if t.size < 3:
        return
    t_half = np.repeat(t, 2)[:-1].copy()
    t_half[1::2] = t[:-1] + 600.0
    air_half = np.repeat(air, 2)[:-1]
    _, one = run_history(SPEC, t, air, setpoint_c=-25.0)
    _, two = run_history(SPEC, t_half, air_half, setpoint_c=-25.0)
    np.testing.assert_allclose(two["mean_diameter_um"], one["mean_diameter_um"], rtol=1e-5)
    np.testing.assert_allclose(two["budget_used_pct"], one["budget_used_pct"], rtol=1e-5, atol=1e-9)


@FAST
@given(
    base=st.floats(-30.0, -15.0),
    amps=st.lists(st.floats(0.0, 3.0), min_size=3, max_size=3),
    periods_h=st.lists(st.floats(3.0, 72.0), min_size=3, max_size=3),
)
def test_sampling_rate_independence_for_smooth_histories(base, amps, periods_h):
    """1-min and 5-min samples of a smooth history agree on growth within 1 % or 0.02 um
    (0.1 % of the budget), whichever is larger.

    The absolute floor is new with model lsw-pop-3, where melt-refreeze is material: at cold
    storage six days grow the mean by under 0.3 um, and short periods alias on the hourly
    population step (a 4-h +-3 K sine at -30 C: 0.076 against 0.078 um, 13 % relative but
    0.01 um, a hundredth of what a microscope resolves). Typical differences are below 0.2 %."""
    grown = []
    for step in (60.0, 300.0):
        t = np.arange(0.0, 6 * 86400.0 + 1, step)
        air = base + sum(a * np.sin(2 * np.pi * t / (p * 3600.0)) for a, p in zip(amps, periods_h))
        grown.append(
            run_history(SPEC, t, air, setpoint_c=base)[1]["mean_diameter_um"][0] - DAIRY.initial.mean_diameter_um
        )
    np.testing.assert_allclose(grown[1], grown[0], rtol=0.01, atol=0.02)

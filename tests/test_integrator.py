"""The one integrator: chunking, step size, sampling rate, orderings, thaw and probes."""

import numpy as np
import pytest

from tests.conftest import run_history
from watcher.errors import ModelError
from watcher.model.integrator import Position, Spec, advance, new_state, outputs

DAY = 86400.0
KEYS = ("mean_diameter_um", "d90_um", "budget_used_pct", "excess_growth_um", "product_c", "share_above_limit")


def defrost_history(days=10.0, step_s=60.0, base=-25.0, rise=6.0, per_day=4, minutes=30.0, t0=1_700_000_000.0):
    t = t0 + np.arange(0.0, days * DAY + step_s / 2, step_s)
    phase = (t - t0) % (DAY / per_day)
    air = base + rise * np.clip(1 - np.abs(phase / (minutes * 60) - 1), 0, 1)
    return t, air


def growth(out, position=0):
    return out["mean_diameter_um"][0, position]


def test_one_call_equals_sample_by_sample(dairy):
    """Feeding a history in one call or one sample at a time gives the same state (1e-9)."""
    spec = Spec(dairy)
    t, air = defrost_history(days=3.0, step_s=300.0)
    _, whole = run_history(spec, t, air, setpoint_c=-25.0)
    _, single = run_history(spec, t, air, setpoint_c=-25.0, chunks=list(range(1, t.size + 1)))
    _, ragged = run_history(spec, t, air, setpoint_c=-25.0, chunks=[1, 2, 17, 300, 301, 302, 700, t.size])
    for key in KEYS:
        np.testing.assert_allclose(single[key], whole[key], rtol=1e-9, atol=1e-12)
        np.testing.assert_allclose(ragged[key], whole[key], rtol=1e-9, atol=1e-12)


def test_zone_result_does_not_depend_on_its_neighbours(dairy):
    """A zone integrated alone or beside others gives the same figures (rows step independently)."""
    spec = Spec(dairy)
    t, air = defrost_history(days=4.0, step_s=120.0)
    others = np.vstack([air, air + 5.0, np.full(air.size, -30.0)])
    _, alone = run_history(spec, t, air, setpoint_c=-25.0)
    _, group = run_history(spec, t, others, setpoint_c=np.array([-25.0, -20.0, -30.0]))
    for key in KEYS:
        np.testing.assert_allclose(group[key][0], alone[key][0], rtol=1e-12)


def test_two_half_steps_equal_one_step(dairy):
    """The same held input fed as dt steps or as dt/2 steps agrees within 1e-6."""
    spec = Spec(dairy)
    t, air = defrost_history(days=5.0, step_s=600.0)
    t_half = np.repeat(t, 2)[:-1].copy()
    t_half[1::2] = t[:-1] + 300.0
    air_half = np.repeat(air, 2)[:-1]
    _, coarse = run_history(spec, t, air, setpoint_c=-25.0)
    _, fine = run_history(spec, t_half, air_half, setpoint_c=-25.0)
    for key in KEYS:
        np.testing.assert_allclose(fine[key], coarse[key], rtol=1e-6)


def test_sampling_rate_does_not_change_the_result(dairy):
    """1-minute and 5-minute samples of one smooth history give growth within 1 %."""
    spec = Spec(dairy)
    results = []
    for step in (60.0, 300.0):
        t = np.arange(0.0, 12 * DAY + 1, step)
        air = -22.0 + 3.0 * np.sin(2 * np.pi * t / (6 * 3600.0)) + 1.5 * np.sin(2 * np.pi * t / (3.5 * DAY))
        results.append(run_history(spec, t, air, setpoint_c=-22.0)[1])
    l0 = dairy.initial.mean_diameter_um
    for pos in range(2):
        g1, g5 = growth(results[0], pos) - l0, growth(results[1], pos) - l0
        assert g5 == pytest.approx(g1, rel=0.01)
        assert results[1]["budget_used_pct"][0, pos] == pytest.approx(results[0]["budget_used_pct"][0, pos], rel=0.01)


def test_warmer_constant_storage_never_grows_less(dairy):
    """Warmer constant storage predicts at least as much growth [published ordering: Sinclair 2025]."""
    spec = Spec(dairy)
    t = np.arange(0.0, 30 * DAY + 1, 3600.0)
    temps = np.array([-35.0, -31.0, -28.9, -25.0, -20.0, -17.8, -15.0, -12.2, -8.0])
    _, out = run_history(spec, t, np.repeat(temps[:, None], t.size, axis=1), setpoint_c=temps)
    mean = out["mean_diameter_um"][:, 0]
    assert np.all(np.diff(mean) >= 0)
    assert mean[0] == pytest.approx(dairy.initial.mean_diameter_um, rel=1e-12)  # below Tg': no coarsening
    assert mean[-1] > mean[3] > mean[1]


@pytest.mark.parametrize(
    ("mean_c", "amp_k", "period_h"), [(-25.0, 2.0, 6.0), (-25.0, 5.0, 24.0), (-20.0, 3.0, 2.0), (-18.0, 6.0, 48.0)]
)
def test_cycling_never_grows_less_than_constant_at_the_mean(dairy, mean_c, amp_k, period_h):
    """Cycling around a mean coarsens at least as much as holding the mean [published: Donhowe & Hartel 1996]."""
    spec = Spec(dairy)
    t = np.arange(0.0, 14 * DAY + 1, 300.0)
    cycle = mean_c + amp_k * np.sign(np.sin(2 * np.pi * t / (period_h * 3600.0)))
    _, out = run_history(spec, t, np.vstack([cycle, np.full(t.size, mean_c)]), setpoint_c=mean_c)
    for pos in range(2):
        assert out["mean_diameter_um"][0, pos] >= out["mean_diameter_um"][1, pos]
    assert out["mean_diameter_um"][0, 0] > out["mean_diameter_um"][1, 0]


def protocol_buyck(time_ts):
    """Square wave -23.3 <-> -12.2 C, switching every 24 h (Buyck et al. 2011) [published protocol]."""
    return np.where(((time_ts // DAY) % 2) == 0, -23.3, -12.2)


def protocol_regand(time_ts):
    """48 h cycle: -20 C 12 h, ramp to -10 C over 12 h, hold 12 h, ramp back 12 h (Regand & Goff 2006) [published, as quoted]."""
    h = (time_ts / 3600.0) % 48.0
    return np.select([h < 12, h < 24, h < 36], [-20.0, -20.0 + (h - 12) * 10 / 12, -10.0], -10.0 - (h - 36) * 10 / 12)


@pytest.mark.parametrize(
    ("protocol", "days", "control_c"), [(protocol_buyck, 28.0, -23.3), (protocol_regand, 14.0, -20.0)]
)
def test_heat_shock_protocols_grow_more_than_their_controls(dairy, protocol, days, control_c):
    """Both published heat-shock protocols predict more growth than constant storage at the
    protocol's cold level and than constant storage at its time-mean temperature."""
    spec = Spec(dairy, (Position("sample", 600.0),))  # small lab samples follow the chamber closely
    t = np.arange(0.0, days * DAY + 1, 300.0)
    shock = protocol(t)
    mean_c = float(shock.mean())
    air = np.vstack([shock, np.full(t.size, control_c), np.full(t.size, mean_c)])
    _, out = run_history(spec, t, air, setpoint_c=control_c)
    m = out["mean_diameter_um"][:, 0]
    assert m[0] > m[2] > m[1]


def test_holding_the_setpoint_costs_no_excess(dairy):
    """A zone held exactly at its setpoint shows zero excess growth; a warmer one shows excess."""
    spec = Spec(dairy)
    t = np.arange(0.0, 10 * DAY + 1, 600.0)
    air = np.vstack([np.full(t.size, -25.0), np.full(t.size, -22.0)])
    _, out = run_history(spec, t, air, setpoint_c=np.array([-25.0, -25.0]))
    np.testing.assert_allclose(out["excess_growth_um"][0], 0.0, atol=1e-9)
    assert np.all(out["excess_growth_um"][1] > 0.5)


def test_thaw_is_reported_plainly(dairy):
    """Above the initial freezing point the product is reported thawed, with no figures."""
    spec = Spec(dairy, (Position("surface", 600.0), Position("core", 8 * 3600.0)))
    t = np.arange(0.0, 2 * DAY + 1, 300.0)
    air = np.where(t > DAY, 10.0, -25.0)
    state, out = run_history(spec, t, air, setpoint_c=-25.0)
    assert out["thawed"][0, 0]
    assert np.isnan(out["mean_diameter_um"][0, 0]) and np.isnan(out["budget_used_pct"][0, 0])
    assert not np.isnan(state.thawed_ts[0, 0])
    # Refreezing does not bring the crystals back: the position stays thawed.
    t2 = t[-1] + np.arange(300.0, DAY, 300.0)
    state2, _ = advance(spec, state, t2, np.full((1, t2.size), -25.0))
    assert outputs(spec, state2)["thawed"][0, 0]


def test_probe_position_uses_product_readings(dairy):
    """A probe position follows the probe readings, falling back to air while none arrive."""
    spec = Spec(dairy, (Position("surface", 3600.0), Position("probe", 0.0, probe=True)))
    t = np.arange(0.0, 2 * DAY + 1, 600.0)
    air = np.full(t.size, -25.0)
    probe = np.where(t < DAY, -24.0, -19.0)
    probe[10:20] = np.nan
    _, out = run_history(spec, t, air, setpoint_c=-25.0, probe_c=probe)
    assert out["product_c"][0, 1] == -19.0
    assert out["product_c"][0, 0] == pytest.approx(-25.0)
    assert out["mean_diameter_um"][0, 1] > out["mean_diameter_um"][0, 0]


def test_days_to_limit_is_conservative_and_exact_on_the_asymptote(dairy):
    """days_to_limit never exceeds the days it really takes at that temperature; from the LSW
    shape (no transient) it matches them within 5 % and the rate is at least the cube law's. (From a broad start the number-mean first lags the cube law, because shrinking
    small crystals still count, so the rate bound holds only on the asymptote; 40 days at
    -15 C put the LSW start past the cells' own start-up.)"""
    from dataclasses import replace

    from watcher.model.kinetics import rate_um3_per_day

    k = float(rate_um3_per_day(dairy.kinetics, -15.0, -2.5))
    for prof in (dairy, replace(dairy, initial=replace(dairy.initial, shape="lsw"))):
        spec = Spec(prof)
        t = np.arange(0.0, 40 * DAY + 1, 3600.0)
        state, out = run_history(spec, t, np.full(t.size, -15.0), setpoint_c=-15.0)
        predicted = out["days_to_limit"][0, 0]
        mean = out["mean_diameter_um"][0, 0]
        if prof.initial.shape == "lsw":
            # The figure is the growth over the next 10 % of L^3 (a secant), so it is compared
            # with the cube law's secant over the same step: K (1.1^(1/3) - 1) / (0.1 L^2).
            cube_secant = k * (1.1 ** (1 / 3) - 1.0) / (0.1 * mean**2)
            assert out["growth_rate_um_per_day"][0, 0] >= cube_secant * (1 - 1e-9)
        assert out["growth_rate_um_per_day"][0, 0] > 0
        # Hold -15 C and find the day the settled mean first reaches the 50 um limit.
        day = 0.0
        while out["mean_diameter_um"][0, 0] < 50.0:
            t2 = state.time_ts + np.arange(3600.0, DAY + 1, 3600.0)
            state, _ = advance(spec, state, t2, np.full((1, t2.size), -15.0))
            out = outputs(spec, state)
            day += 1
        assert predicted <= day + 1
        if prof.initial.shape == "lsw":
            assert predicted == pytest.approx(day, rel=0.05, abs=1.0)


def test_times_must_increase(dairy):
    """Samples at or before the state's time are refused with a ModelError."""
    spec = Spec(dairy)
    state = new_state(spec, 1000.0, -25.0, -25.0)
    with pytest.raises(ModelError, match="increase"):
        advance(spec, state, np.array([1000.0]), np.array([[-25.0]]))
    with pytest.raises(ModelError, match="increase"):
        advance(spec, state, np.array([2000.0, 1500.0]), np.array([[-25.0, -25.0]]))
    with pytest.raises(ModelError, match="finite"):
        advance(spec, state, np.array([2000.0]), np.array([[np.nan]]))


def test_trace_records_every_completed_hour(dairy):
    """trace=True returns the settled mean, committed budget and product temperature at each
    completed UTC hour (for charts); the last entry matches the state's committed budget."""
    spec = Spec(dairy)
    t0 = 1_795_003_200.0  # a whole UTC hour
    state = new_state(spec, t0, -25.0, -25.0)
    t = t0 + np.arange(60.0, DAY + 1, 60.0)
    air = np.where((t - t0) % 21600 < 1800, -19.0, -25.0)
    state, trace = advance(spec, state, t, air[None, :], trace=True)
    assert trace.time_ts.size == 24 and np.all(np.diff(trace.time_ts) == 3600.0) and trace.time_ts[0] == t0 + 3600
    assert trace.mean_diameter_um.shape == (24, 1, 3) and trace.product_c.shape == (24, 1, 2)
    np.testing.assert_array_equal(trace.budget_fraction[-1], state.peak_budget)
    assert np.all(np.diff(trace.budget_fraction[:, 0, 0]) >= 0)
    _, none = advance(spec, state, t[-1:] + 60.0, air[None, -1:])
    assert none is None

"""The size-class population: conservation, the LSW cube-law asymptote, melt and refreeze."""

import numpy as np
import pytest

from watcher.model import population as pop
from watcher.model.kinetics import LSW_A_OVER_K


def seeded(shape="lsw", cv=0.35, mean=35.0, classes=64, ice=0.5):
    ub, w = pop.initial_cells(mean, cv, shape, classes)
    n = w / pop.volume(ub[None], w[None])[0] * ice
    return ub[None].copy(), n[None].copy()


def isothermal_run(u, n, k_um3_per_day, days, step_days=1.0 / 24):
    a = LSW_A_OVER_K * k_um3_per_day
    t, means = [0.0], [float(pop.mean_diameter(u, n)[0])]
    for i in range(int(round(days / step_days))):
        pop.lsw_advance(u, n, np.array([a * step_days]), 0.02)
        t.append((i + 1) * step_days)
        means.append(float(pop.mean_diameter(u, n)[0]))
    return np.array(t), np.array(means)


@pytest.mark.parametrize(("shape", "cv"), [("lsw", 0.0), ("gamma", 0.35), ("gamma", 0.6)])
def test_seeded_population_has_the_requested_mean(shape, cv):
    """A fresh population's number-mean diameter is the profile's initial mean."""
    u, n = seeded(shape, cv, mean=35.0)
    assert pop.mean_diameter(u, n)[0] == pytest.approx(35.0, rel=1e-12)


def test_cube_law_slope_from_the_lsw_asymptote():
    """From the LSW distribution, L^3 is linear in t with slope K within 2 % [published: Tadros eq. 10.64, cube law]."""
    k = 3000.0
    u, n = seeded("lsw")
    t, mean = isothermal_run(u, n, k, 100.0)
    fit = np.polyfit(t, mean**3, 1)
    assert fit[0] == pytest.approx(k, rel=0.02)
    resid = mean**3 - np.polyval(fit, t)
    assert np.max(np.abs(resid)) < 0.01 * mean[-1] ** 3  # linear, not just the right average slope
    assert mean[-1] > 2.0 * mean[0]


def test_broad_start_relaxes_towards_the_cube_law():
    """A broad (gamma) start coarsens faster than K at first, and its slope falls towards K."""
    k = 3000.0
    u, n = seeded("gamma", 0.35)
    t, mean = isothermal_run(u, n, k, 120.0)
    early = np.polyfit(t[: 24 * 10], mean[: 24 * 10] ** 3, 1)[0]
    late = np.polyfit(t[24 * 80 :], mean[24 * 80 :] ** 3, 1)[0]
    assert early > 1.5 * k
    assert k * 0.9 < late < early


def test_lsw_start_keeps_largest_crystal_near_one_and_a_half_means():
    """From the LSW distribution the largest crystal stays at about 1.5 mean radii [LSW cutoff]."""
    u, n = seeded("lsw")
    isothermal_run(u, n, 3000.0, 60.0)
    d_max = np.cbrt(u[0, -1])
    assert 1.45 <= d_max / pop.mean_diameter(u, n)[0] <= 1.52


def test_isothermal_coarsening_conserves_ice_volume_and_loses_crystals():
    """Ice volume is unchanged at constant temperature; crystal number falls (Ostwald ripening)."""
    u, n = seeded("gamma", 0.5)
    v0, c0 = pop.volume(u, n)[0], pop.count(u, n)[0]
    isothermal_run(u, n, 5000.0, 30.0)
    assert pop.volume(u, n)[0] == pytest.approx(v0, rel=1e-12)
    assert pop.count(u, n)[0] < 0.8 * c0


def test_isothermal_mean_never_decreases():
    """At constant temperature the mean diameter rises smoothly: no class-removal sawtooth.

    Point classes dropped the mean by ~0.5 um per hour each time a small class shrank away;
    the cells allow at most 1e-4 of the mean (0.004 um at 40 um) between hourly steps.
    """
    u, n = seeded("lsw")
    _, mean = isothermal_run(u, n, 3000.0, 60.0)
    assert np.all(np.diff(mean) > -1e-4 * mean[1:])
    assert mean[-1] > mean[0] * 1.3


def test_broad_start_dips_only_slightly_before_coarsening():
    """From a gamma start the number-mean may dip at first (no crystal is near zero yet to
    dissolve while the small ones shrink: real LSW behaviour), but by less than 0.5 %."""
    u, n = seeded("gamma", 0.35)
    _, mean = isothermal_run(u, n, 3000.0, 20.0)
    assert mean.min() > 0.995 * mean[0]
    assert mean[24] > mean[0]
    assert np.all(np.diff(mean[48:]) > -2e-4 * mean[49:])


def test_melting_removes_smallest_first_and_refreezing_grows_survivors():
    """Melt: crystals shrink by one shell and small ones vanish; refreeze: no new nuclei, survivors grow."""
    u, n = seeded("gamma", 0.35, ice=0.53)
    c0, m0 = pop.count(u, n)[0], pop.mean_diameter(u, n)[0]
    pop.shift_to_volume(u, n, np.array([0.30]), np.array([True]))
    assert pop.volume(u, n)[0] == pytest.approx(0.30, rel=1e-12)
    c1 = pop.count(u, n)[0]
    assert c1 < c0
    assert pop.mean_diameter(u, n)[0] < m0
    pop.shift_to_volume(u, n, np.array([0.53]), np.array([True]))
    assert pop.volume(u, n)[0] == pytest.approx(0.53, rel=1e-12)
    assert pop.count(u, n)[0] == pytest.approx(c1, rel=1e-9)
    assert pop.mean_diameter(u, n)[0] > m0  # the melt-refreeze cycle coarsened the population


def test_melting_everything_leaves_an_empty_row():
    """Melting to zero ice leaves no crystals (thawed), with no NaN in the state."""
    u, n = seeded()
    pop.shift_to_volume(u, n, np.array([0.0]), np.array([True]))
    assert pop.count(u, n)[0] == 0.0
    assert np.isnan(pop.mean_diameter(u, n)[0])
    assert np.all(np.isfinite(u))


def test_refill_split_is_exact():
    """Dropping dissolved cells and splitting wide ones keeps number, mean and volume exactly."""
    u, n = seeded("gamma", 0.5)
    isothermal_run(u, n, 5000.0, 10.0)
    u[0, :20] = np.minimum(u[0, :20], -1.0)  # force the 19 lowest cells to have dissolved
    before = (pop.count(u, n)[0], pop.mean_diameter(u, n)[0], pop.volume(u, n)[0])
    pop.refill(u, n)
    assert (u[0, 1:] > 0).all()
    after = (pop.count(u, n)[0], pop.mean_diameter(u, n)[0], pop.volume(u, n)[0])
    assert after == pytest.approx(before, rel=1e-12)


def test_quantile_and_share_above_limit():
    """d90 lies above the mean; the volume share above a limit falls as the limit rises."""
    u, n = seeded("lsw")
    mean = pop.mean_diameter(u, n)[0]
    d90 = pop.quantile_diameter(u, n, 0.9)[0]
    assert mean < d90 < 1.5 * mean
    shares = [pop.volume_share_above(u, n, x)[0] for x in (10.0, 35.0, 45.0, 60.0)]
    assert shares[0] == pytest.approx(1.0, abs=1e-3)
    assert all(a > b for a, b in zip(shares, shares[1:]))
    assert shares[-1] == 0.0

"""Closed-form checks: LSW distribution, WLF shift, ice fraction, Arrhenius scaling."""

import math

import numpy as np
import pytest

from watcher.model.icefraction import ice_fraction
from watcher.model.kinetics import Kinetics, rate_um3_per_day, wlf_log10_shift
from watcher.model.lsw import lsw_moments, lsw_pdf


def test_lsw_distribution_moments():
    """The LSW density integrates to 1 with mean 1, std 0.2151, mode 1.1346, <rho^3> 1.1296."""
    # Formula [from memory] as in the domain brief; the moments are derived there from it.
    m = lsw_moments()
    assert m["integral"] == pytest.approx(1.0, abs=1e-6)
    assert m["mean"] == pytest.approx(1.0, abs=1e-6)
    assert m["std"] == pytest.approx(0.2151, abs=5e-5)
    assert m["mode"] == pytest.approx(1.1346, abs=5e-4)
    assert m["third_moment"] == pytest.approx(1.1296, abs=5e-5)


def test_lsw_density_is_zero_at_and_above_cutoff():
    """No mass at or above rho = 1.5 (LSW cutoff), and none below zero."""
    assert np.all(lsw_pdf(np.array([1.5, 1.6, 3.0, -0.1])) == 0.0)
    assert lsw_pdf(np.array([1.4999]))[0] < 1e-30


@pytest.mark.parametrize(("temp_c", "expected"), [(-25.0, -2.0833), (-18.0, -3.7220)])
def test_wlf_shift_check_values(temp_c, expected):
    """log10 aT with Tg' = -32 C, C1 17.44, C2 51.6 K (WLF 1955; IUPAC Gold Book) [published form, derived values]."""
    assert float(wlf_log10_shift(temp_c, -32.0)) == pytest.approx(expected, abs=5e-5)


@pytest.mark.parametrize(("temp_c", "expected"), [(-5.0, 0.3085), (-10.0, 0.4627), (-18.0, 0.5313)])
def test_ice_fraction_check_values(temp_c, expected):
    """x_ice = (x_wo - x_b)(1 - t_f/t), x_wo 0.617, x_b 0, t_f -2.5 C (ASHRAE form) [derived in the brief]."""
    assert float(ice_fraction(temp_c, 0.617, 0.0, -2.5)) == pytest.approx(expected, abs=1e-4)


def test_ice_fraction_is_zero_when_thawed_and_rises_when_colder():
    """No ice at or above the initial freezing point; more ice at colder temperatures."""
    t = np.array([5.0, 0.0, -2.5, -3.0, -10.0, -30.0])
    x = ice_fraction(t, 0.617, 0.05, -2.5)
    assert np.all(x[:3] == 0.0)
    assert np.all(np.diff(x[2:]) > 0)
    assert x[-1] < 0.617 - 0.05


def test_arrhenius_rate_scales_by_activation_energy():
    """K(T)/K_ref = exp(-Ea/R (1/T - 1/T_ref)) [published Arrhenius form]; zero below Tg'."""
    kin = Kinetics("arrhenius", 1000.0, -18.0, -32.0, activation_energy_kj_per_mol=80.0)
    k = rate_um3_per_day(kin, np.array([-18.0, -25.0, -33.0]), -2.5)
    assert k[0] == pytest.approx(1000.0)
    expected = 1000.0 * math.exp(-80000.0 / 8.314462618 * (1 / 248.15 - 1 / 255.15))
    assert k[1] == pytest.approx(expected, rel=1e-12)
    assert k[2] == 0.0


def test_wlf_rate_uses_shift_ratio_and_stops_below_tg():
    """WLF: K(T) = K_ref 10^(log aT(T_ref) - log aT(T)); the ratio -18/-25 C is 10^1.6387 [derived]."""
    kin = Kinetics("wlf", 500.0, -25.0, -32.0)
    k = rate_um3_per_day(kin, np.array([-25.0, -18.0, -32.5]), -2.5)
    assert k[0] == pytest.approx(500.0)
    assert k[1] / k[0] == pytest.approx(10 ** (3.7220 - 2.0833), rel=2e-4)
    assert k[2] == 0.0

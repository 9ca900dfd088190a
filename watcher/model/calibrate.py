"""Fit a profile's kinetics to a storage trial: mean diameter measured at constant temperatures.

The forward model is the population model itself, not the bare cube law: an isothermal run
depends on time only through the reduced time theta = a_d(T) t, and the LSW law is
scale-free (sizes x s, theta x s^3), so one dimensionless master curve L/L0 versus
theta/L0^3, computed once for the profile's initial distribution, gives every prediction.

Parameters: Arrhenius fits ln K_ref and Ea; WLF fits ln K_ref with Tg', C1, C2 taken from the
base profile. Least squares on diameter (um) by Levenberg-Marquardt with a numerical Jacobian;
uncertainties from s^2 (J^T J)^-1. Each temperature group is also fitted on its own
(K only) so the ordering of rates with temperature can be read directly.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np

from watcher.errors import TrialError
from watcher.model.kinetics import LSW_A_OVER_K, rate_um3_per_day
from watcher.model.population import master_curve
from watcher.model.profiles import Life, Profile, k_ref_for_life

#: z of the two-sided 90 % normal interval: ranges are K / f .. K x f with f = exp(z sd(ln K)).
Z_90 = 1.6449


@dataclass(frozen=True)
class Trial:
    days: np.ndarray
    temp_c: np.ndarray
    mean_diameter_um: np.ndarray
    initial_um: float
    scale: str | None = None  # measurement method of the sizes; None: not declared
    name: str = "a storage trial"  # where the measurements come from (the file's name)


@dataclass(frozen=True)
class GroupFit:
    temp_c: float
    k_um3_per_day: float
    k_rel_sd: float
    n: int


@dataclass(frozen=True)
class Fit:
    profile: Profile
    params: dict[str, float]
    sd: dict[str, float]
    predicted_um: np.ndarray
    residual_um: np.ndarray
    rmse_um: float
    groups: tuple[GroupFit, ...]
    limit_basis: str = ""  # how the texture limit on the trial's scale was set


def make_trial(days, temp_c, mean_diameter_um, scale: str | None = None, name: str = "a storage trial") -> Trial:
    """Split rows into the day-0 initial size and the storage measurements."""
    days = np.asarray(days, dtype=float)
    temp = np.asarray(temp_c, dtype=float)
    size = np.asarray(mean_diameter_um, dtype=float)
    start = days == 0
    if not start.any():
        raise TrialError("trial", "no row with days = 0", "a day-0 row giving the initial mean diameter")
    later = days > 0
    if later.sum() < 2:
        raise TrialError("trial", int(later.sum()), "at least two measurements after day 0")
    return Trial(days[later], temp[later], size[later], float(size[start].mean()), scale, name)


def trial_limit(
    trial: Trial, base: Profile, limit_um: float | None = None, limit_ratio: float | None = None
) -> tuple[float, float | None, str, str]:
    """(limit in um, limit ratio or None, scale, how the limit was set) for a profile fitted to
    `trial`.

    Initial size, limit and trial sizes must be on one measurement scale. The trial brings its
    own day-0 size; the limit is taken, in this order, from an explicit limit on the trial's
    scale, an explicit ratio, the base profile's ratio, the base profile's absolute limit when
    the trial is on the base's scale (or declares none), or else the base's limit carried over
    as a ratio to the base's initial size, never as an absolute size from another scale; the
    fourth value says which, and calibrate prints it."""
    scale = trial.scale or base.scale
    if limit_um is not None and limit_ratio is not None:
        raise TrialError("--limit-um", limit_um, "only one of --limit-um and --limit-ratio")
    if limit_um is not None:
        return float(limit_um), None, scale, f"given on the {scale} scale"
    if limit_ratio is not None:
        return limit_ratio * trial.initial_um, float(limit_ratio), scale, "given as a multiple of the day-0 size"
    if base.limit_ratio is not None:
        return base.limit_ratio * trial.initial_um, base.limit_ratio, scale, f"the ratio of base {base.name}"
    if scale == base.scale:
        return base.limit_mean_diameter_um, None, scale, f"the limit of base {base.name} (same scale)"
    ratio = base.limit_mean_diameter_um / base.initial.mean_diameter_um
    return (
        ratio * trial.initial_um,
        ratio,
        scale,
        f"carried as a ratio ({base.limit_mean_diameter_um:g} / {base.initial.mean_diameter_um:g} um of base "
        f"{base.name}, {base.scale}) because the trial is on another scale; give --limit-um to set it on this scale",
    )


def rate_factor_90(sd_ln_k: float) -> float:
    """The 90 % range factor of K from the standard deviation of ln K."""
    return float(math.exp(Z_90 * sd_ln_k)) if math.isfinite(sd_ln_k) else 100.0


def predict_isothermal(master: tuple[np.ndarray, np.ndarray], l0_um: float, k_um3_per_day, days) -> np.ndarray:
    """Mean diameter after `days` at a constant rate K (um^3/day), from the master curve."""
    th, ratio = master
    x = LSW_A_OVER_K * np.asarray(k_um3_per_day, dtype=float) * np.asarray(days, dtype=float) / l0_um**3
    inside = np.interp(x, th, ratio)
    # Past the curve: continue with the cube law from its last point (slope K in L^3).
    beyond = np.cbrt(ratio[-1] ** 3 + (x - th[-1]) / LSW_A_OVER_K)
    return l0_um * np.where(x <= th[-1], inside, beyond)


def _levenberg_marquardt(residuals, p0: np.ndarray, max_iter: int = 200) -> tuple[np.ndarray, np.ndarray]:
    """Minimise sum(residuals(p)^2); return the parameters and the Jacobian at the optimum."""
    p = p0.astype(float).copy()
    lam = 1e-3

    def jac(p):
        r0 = residuals(p)
        cols = []
        for i in range(p.size):
            h = 1e-6 * max(1.0, abs(p[i]))
            q = p.copy()
            q[i] += h
            cols.append((residuals(q) - r0) / h)
        return r0, np.stack(cols, axis=1)

    r, j = jac(p)
    cost = float(r @ r)
    for _ in range(max_iter):
        a = j.T @ j
        g = j.T @ r
        step = np.linalg.solve(a + lam * np.diag(np.diag(a) + 1e-12), -g)
        trial = p + step
        r_new = residuals(trial)
        cost_new = float(r_new @ r_new)
        if np.isfinite(cost_new) and cost_new < cost:
            converged = abs(cost - cost_new) <= 1e-12 * max(cost, 1e-300) or np.max(np.abs(step)) < 1e-10
            p, cost = trial, cost_new
            r, j = jac(p)
            lam = max(lam / 10.0, 1e-12)
            if converged:
                break
        else:
            lam *= 10.0
            if lam > 1e12:
                break
    return p, j


def _covariance(j: np.ndarray, r: np.ndarray) -> np.ndarray:
    dof = max(r.size - j.shape[1], 1)
    s2 = float(r @ r) / dof
    return s2 * np.linalg.pinv(j.T @ j)


def _naive_k(trial: Trial, mask: np.ndarray) -> float:
    """Least-squares slope of L^3 - L0^3 against t through the origin (a starting value)."""
    t = trial.days[mask]
    y = trial.mean_diameter_um[mask] ** 3 - trial.initial_um**3
    return max(float(t @ y) / float(t @ t), 1e-3)


def fit_trial(
    trial: Trial,
    base: Profile,
    name: str,
    form: str | None = None,
    limit_um: float | None = None,
    limit_ratio: float | None = None,
) -> Fit:
    """Fit the kinetics of `base` (form from base unless given) to the trial; the new profile
    is on the trial's measurement scale (``trial_limit``)."""
    form = form or base.kinetics.form
    kin0 = replace(base.kinetics, form=form)
    initial = replace(base.initial, mean_diameter_um=trial.initial_um)
    limit, ratio, scale, limit_basis = trial_limit(trial, base, limit_um, limit_ratio)
    if trial.initial_um >= limit:
        raise TrialError("trial.day0.mean_diameter_um", trial.initial_um, f"below the texture limit {limit:g} um")
    master = master_curve(initial.shape, initial.spread_cv)
    fp = base.ice.initial_freezing_point_c
    if np.any(trial.temp_c >= fp):
        bad = float(trial.temp_c[trial.temp_c >= fp][0])
        raise TrialError("trial.temp_c", bad, f"a frozen storage temperature below the initial freezing point {fp} C")
    temps = np.unique(trial.temp_c)

    def kin_with(p):
        ea = float(p[1]) if form == "arrhenius" else kin0.activation_energy_kj_per_mol
        return replace(kin0, k_ref_um3_per_day=float(math.exp(p[0])), activation_energy_kj_per_mol=ea)

    def residuals(p):
        k = rate_um3_per_day(kin_with(p), trial.temp_c, fp)
        return predict_isothermal(master, trial.initial_um, k, trial.days) - trial.mean_diameter_um

    # Starting values: the naive cube-law rate per group, and for Arrhenius a line in 1/T.
    k_naive = np.array([_naive_k(trial, trial.temp_c == t) for t in temps])
    inv_t = 1.0 / (temps + 273.15) - 1.0 / (kin0.ref_temp_c + 273.15)
    if form == "arrhenius" and temps.size >= 2:
        slope, icpt = np.polyfit(inv_t, np.log(k_naive), 1)
        p0 = np.array([icpt, max(-slope * 8.314462618 / 1000.0, 1.0)])
    else:
        scale = rate_um3_per_day(replace(kin0, k_ref_um3_per_day=1.0), temps, fp)
        ok = scale > 0
        p0 = np.array([float(np.mean(np.log(k_naive[ok] / scale[ok]))) if ok.any() else 0.0])
        if form == "arrhenius":
            p0 = np.append(p0, 60.0)
    if form == "arrhenius" and temps.size < 2:
        raise TrialError(
            "trial.temp_c", temps.tolist(), "at least two storage temperatures to fit an activation energy"
        )
    p, j = _levenberg_marquardt(residuals, p0)
    if form == "arrhenius" and p[1] <= 0:
        raise TrialError(
            "trial",
            f"fitted activation energy {p[1]:.3g} kJ/mol",
            "a positive activation energy (warmer storage must coarsen faster)",
        )
    r = residuals(p)
    cov = _covariance(j, r)
    sd = np.sqrt(np.maximum(np.diag(cov), 0.0))
    kin = replace(kin_with(p), rate_factor_90=min(rate_factor_90(float(sd[0])), 100.0))
    params = {"k_ref_um3_per_day": kin.k_ref_um3_per_day, "ref_temp_c": kin.ref_temp_c}
    sds = {"k_ref_um3_per_day": kin.k_ref_um3_per_day * float(sd[0])}
    if form == "arrhenius":
        params["activation_energy_kj_per_mol"] = float(p[1])
        sds["activation_energy_kj_per_mol"] = float(sd[1])
    groups = tuple(_fit_group(trial, master, t, k) for t, k in zip(temps, k_naive))
    profile = replace(
        base,
        name=name,
        kinetics=kin,
        initial=initial,
        limit_mean_diameter_um=limit,
        limit_ratio=ratio,
        scale=scale,
        life=None,
        description=f"Calibrated from a storage trial ({trial.days.size} measurements at {temps.size} temperatures).",
        # The fit's own evidence: the trial, not the base profile's citations (which stay with the base).
        source=f"Fitted to {trial.name} ({trial.days.size} measurements); ice, texture and thermal parameters "
        f"from profile {base.name}",
    )
    return Fit(
        profile=profile,
        params=params,
        sd=sds,
        predicted_um=r + trial.mean_diameter_um,
        residual_um=r,
        rmse_um=float(np.sqrt(np.mean(r * r))),
        groups=groups,
        limit_basis=limit_basis,
    )


def _fit_group(trial: Trial, master, temp_c: float, k0: float) -> GroupFit:
    mask = trial.temp_c == temp_c
    days, obs = trial.days[mask], trial.mean_diameter_um[mask]

    def residuals(p):
        return predict_isothermal(master, trial.initial_um, math.exp(p[0]), days) - obs

    p, j = _levenberg_marquardt(residuals, np.array([math.log(k0)]))
    r = residuals(p)
    sd = float(np.sqrt(max(_covariance(j, r)[0, 0], 0.0))) if days.size > 1 else float("nan")
    return GroupFit(temp_c=float(temp_c), k_um3_per_day=float(math.exp(p[0])), k_rel_sd=sd, n=int(days.size))


def from_declared_life(base: Profile, name: str, life: Life, rate_factor: float | None = None) -> Profile:
    """A profile anchored to a declared storage life (N days at T): the base's shape, limit,
    ice curve and temperature dependence, with K_ref such that constant T reaches the limit
    after N days."""
    kin = base.kinetics if rate_factor is None else replace(base.kinetics, rate_factor_90=float(rate_factor))
    k_ref = k_ref_for_life(
        kin, base.initial, base.limit_mean_diameter_um, life, base.ice.initial_freezing_point_c, "--life"
    )
    return replace(
        base,
        name=name,
        life=life,
        kinetics=replace(kin, k_ref_um3_per_day=k_ref),
        description=f"Anchored to a declared storage life of {life.days:g} days at {life.temp_c:g} C.",
        source=f"Declared storage life, {life.days:g} days at {life.temp_c:g} C; other parameters from {base.name}",
    )

"""Ice crystals as size classes: a Lagrangian population balance on moving cells.

Each row is one population (a zone position, a lot, a counterfactual). A row holds C classes;
class k is a cell of crystals whose u = d^3 (um^3) lies uniformly between two moving
boundaries ``ub[k]`` and ``ub[k+1]``, with number weight ``nc[k]``. Every boundary follows the
LSW diffusion-limited growth law (domain brief, section 2) written in u:

    du/dtheta = 3 (d / d_mean - 1),     dtheta = a_d(T) dt,   a_d = (9/4) K(T)

with d_mean the number-mean diameter. The right-hand side is bounded, so nothing blows up as
crystals shrink to zero. The part of a cell that has moved below u = 0 has dissolved, so
crystals leave the population continuously (as in the continuous LSW equation) and the mean
does not jump when a class disappears. Ice volume is conserved at constant temperature: the
small error of the uniform-cell assumption is removed by an exact rescale after every step.
A cell that has dissolved completely is dropped and the cell widest in diameter is split in
two halves, which is exact for a uniform cell, so the class count stays C.

Melting and refreezing are diffusion limited: the flux to or from a sphere is proportional to
its radius, so every crystal's volume changes at a rate proportional to its diameter
(du/dt ~ d), which moves every boundary by one common amount in d^2. A melt therefore takes a
larger share of a small crystal than of a large one, and the smallest vanish; refreezing
deposits the water on the survivors (no new nuclei form). This is the driving-force part of
the same growth law, du/dtheta = 3 (kappa d - 1) with kappa set by the change of ice volume;
its capillary (Gibbs-Thomson) part, the -1, acts in the LSW step of the same hour, where it
dissolves the crystals the melt has shrunk.

Weights are scaled so that the ice volume sum equals the ice fraction (the pi/6 and the
density ratio cancel); only ratios matter to the growth law.
"""

from __future__ import annotations

import math
from functools import lru_cache

import numpy as np

from watcher.model.kinetics import LSW_A_OVER_K
from watcher.model.lsw import RHO_MAX, lsw_pdf

_NEWTON_MAX_STEPS = 12
_NEWTON_RTOL = 1e-7
_SUB = 64  # quadrature points per cell when seeding a distribution
MASTER_POINTS = 400
NUMBER_SHARE = 0.8  # weight of the number distribution in cell placement (initial_cells)
MASTER_MAX_RATIO = 12.0  # the master curve runs until L = 12 L0; the cube law extends it


def initial_cells(
    mean_diameter_um: float, spread_cv: float, shape: str, n_classes: int
) -> tuple[np.ndarray, np.ndarray]:
    """Boundaries in u (C+1,) and number weights (C,) of a fresh population with the given
    number-mean diameter; weights sum to 1.

    shape "gamma": gamma distribution of diameter with coefficient of variation spread_cv;
    shape "lsw": the LSW self-similar distribution (spread fixed at 0.2151).
    """
    if shape == "lsw":
        hi = RHO_MAX
        pdf = lsw_pdf
    else:
        k = 1.0 / spread_cv**2
        hi = 1.0 + 7.0 * spread_cv

        def pdf(x):
            x = np.maximum(x, 1e-300)
            return np.exp((k - 1.0) * np.log(x) - k * x - ((k - 1.0) * math.log((k - 1.0) / k) - (k - 1.0)))

    # Cell edges at equal steps of a blend of the number and the volume distribution: the
    # small crystals (most of the number) and the large ones (most of the ice) both get cells.
    # Weighted 0.8 to number: melt-refreeze acts on the small tail, and a 4-h +8 K fault at
    # -25 C then costs within 1 % of a 256-class run with 64 classes (0.5: 22 % low), while the
    # isothermal mean stays within 0.9 % up to twice the initial size (0.5: 0.8 %).
    fine = np.linspace(0.0, hi, 20_001)
    dens = pdf(0.5 * (fine[:-1] + fine[1:])) * np.diff(fine)
    mid = 0.5 * (fine[:-1] + fine[1:])
    cdf_n = np.concatenate(([0.0], np.cumsum(dens)))
    cdf_v = np.concatenate(([0.0], np.cumsum(dens * mid**3)))
    blend = NUMBER_SHARE * cdf_n / cdf_n[-1] + (1.0 - NUMBER_SHARE) * cdf_v / cdf_v[-1]
    edges = np.interp(np.linspace(0.0, 1.0, n_classes + 1), blend, fine)
    edges[-1] = min(edges[-1], hi)
    frac = (np.arange(_SUB) + 0.5) / _SUB
    pts = edges[:-1, None] + np.diff(edges)[:, None] * frac[None, :]
    weights = pdf(pts).mean(axis=1) * np.diff(edges)
    weights = weights / weights.sum()
    ub = edges**3
    mean = float(mean_diameter(ub[None], weights[None])[0])
    scale = mean_diameter_um / mean
    return ub * scale**3, weights


def _cell_parts(ub: np.ndarray, nc: np.ndarray, cb: np.ndarray | None = None):
    """Live bounds a <= b (in u), live number and mean diameter of each cell.

    cb, the signed cube root of ub, may be passed when the caller already has it. The mean
    diameter over a cell uniform in u on [a, b] is (3/4)(b^(4/3) - a^(4/3)) / (b - a).
    """
    if cb is None:
        cb = np.cbrt(ub)
    live_u = np.maximum(ub, 0.0)
    moment = live_u * np.maximum(cb, 0.0)  # u^(4/3) of the live part
    a, b = live_u[..., :-1], live_u[..., 1:]
    span = b - a
    width = ub[..., 1:] - ub[..., :-1]
    n_eff = np.divide(nc * span, width, out=np.zeros_like(span), where=width > 0)
    d_mean = np.divide(0.75 * (moment[..., 1:] - moment[..., :-1]), span, out=np.zeros_like(span), where=span > 0)
    return a, b, n_eff, d_mean


def count(ub: np.ndarray, nc: np.ndarray) -> np.ndarray:
    return _cell_parts(ub, nc)[2].sum(axis=-1)


def volume(ub: np.ndarray, nc: np.ndarray) -> np.ndarray:
    """Ice volume (in ice-fraction units) per row."""
    a, b, n_eff, _ = _cell_parts(ub, nc)
    return np.einsum("...c,...c->...", n_eff, 0.5 * (a + b))


def mean_diameter(ub: np.ndarray, nc: np.ndarray) -> np.ndarray:
    """Number-mean diameter per row; NaN where no crystal is left."""
    _, _, n_eff, d_mean = _cell_parts(ub, nc)
    total = n_eff.sum(axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(total > 0, np.einsum("...c,...c->...", n_eff, d_mean) / total, np.nan)


def _velocity(ub: np.ndarray, nc: np.ndarray) -> np.ndarray:
    """du/dtheta of every boundary."""
    cb = np.cbrt(ub)
    _, _, n_eff, d_cell = _cell_parts(ub, nc, cb)
    total = n_eff.sum(axis=-1, keepdims=True)
    with np.errstate(invalid="ignore", divide="ignore"):
        d_mean = np.einsum("...c,...c->...", n_eff, d_cell)[..., None] / total
        v = 3.0 * (cb / d_mean - 1.0)
    return np.where(total > 0, v, 0.0)


def _rescale(ub: np.ndarray, nc: np.ndarray, v_target: np.ndarray, v_now: np.ndarray | None = None) -> None:
    """Scale u so each row holds v_target exactly (volume is linear in that scale)."""
    if v_now is None:
        v_now = volume(ub, nc)
    with np.errstate(invalid="ignore", divide="ignore"):
        scale = np.where(v_now > 0, np.maximum(v_target, 0.0) / v_now, 1.0)
    ub *= scale[..., None]
    empty = (v_now <= 0) | (v_target <= 0)
    if empty.any():
        nc[empty] = 0.0


def lsw_advance(ub: np.ndarray, nc: np.ndarray, dtheta_um3: np.ndarray, rel_tol: float) -> None:
    """Advance rows in place by reduced time dtheta (um^3) with midpoint (RK2) substeps.

    A row's substep count keeps 3 h / (mean crystal volume) below rel_tol, so each row's
    result depends on its own history only, not on which rows share the call.
    """
    a, b, n_eff, _ = _cell_parts(ub, nc)
    v0 = np.einsum("...c,...c->...", n_eff, 0.5 * (a + b))
    n_now = n_eff.sum(axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        u_mean = np.where(n_now > 0, v0 / n_now, np.inf)
        n_sub = np.ceil(3.0 * dtheta_um3 / (rel_tol * u_mean))
    n_sub = np.where((dtheta_um3 > 0) & (n_now > 0) & (v0 > 0), np.maximum(n_sub, 1.0), 0.0)
    steps = int(n_sub.max()) if n_sub.size else 0
    with np.errstate(invalid="ignore", divide="ignore"):
        h = np.where(n_sub > 0, dtheta_um3 / n_sub, 0.0)[..., None]
    for j in range(steps):
        hj = h if j == 0 or (n_sub > j).all() else np.where((n_sub > j)[..., None], h, 0.0)
        k1 = _velocity(ub, nc)
        k2 = _velocity(ub + 0.5 * hj * k1, nc)
        ub += hj * k2
        _rescale(ub, nc, v0)
    if steps:
        refill(ub, nc)


def refill(ub: np.ndarray, nc: np.ndarray, min_live_share: float = 0.75) -> None:
    """Where fewer than min_live_share of a row's cells are live, drop the dissolved cells and
    split the widest live cells in two, restoring C classes. Splitting a uniform cell at its
    midpoint in u is exact, so this adds no numerical diffusion."""
    n_classes = nc.shape[-1]
    live = (ub[..., 1:] > 0).sum(axis=-1)
    rows = (live < min_live_share * n_classes) & (live > 0) & (nc.sum(axis=-1) > 0)
    if not rows.any():
        return
    for r in zip(*np.nonzero(rows)):
        ub[r], nc[r] = _refill_row(ub[r], nc[r])


def _refill_row(ub: np.ndarray, nc: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    n_classes = nc.size
    first = int(np.argmax(ub[1:] > 0))
    bounds = ub[first:].copy()
    weights = nc[first:].copy()
    while weights.size < n_classes:
        d = np.cbrt(np.maximum(bounds, 0.0))
        k = min(n_classes - weights.size, weights.size)
        widest = np.sort(np.argpartition(-np.diff(d), k - 1)[:k])
        mids = 0.5 * (bounds[widest] + bounds[widest + 1])
        bounds = np.insert(bounds, widest + 1, mids)
        halves = 0.5 * weights[widest]
        weights[widest] = halves
        weights = np.insert(weights, widest + 1, halves)
    return bounds, weights


def _cut_dissolved(ub: np.ndarray, nc: np.ndarray) -> None:
    """Make dissolution permanent before a shell shift: dissolved cells lose their weight, and
    partly dissolved cells keep only their live share with the lower boundary moved to zero,
    so refreezing grows the survivors and never brings dissolved crystals back."""
    lo, hi = ub[..., :-1], ub[..., 1:]
    nc[hi <= 0] = 0.0
    partial = (lo < 0) & (hi > 0)
    if not partial.any():
        return
    with np.errstate(invalid="ignore", divide="ignore"):
        nc[...] = np.where(partial, nc * hi / (hi - lo), nc)
    lower = np.concatenate([partial, np.zeros(partial.shape[:-1] + (1,), dtype=bool)], axis=-1)
    ub[lower] = 0.0


def shift_to_volume(ub: np.ndarray, nc: np.ndarray, v_target: np.ndarray, rows: np.ndarray) -> None:
    """Melt (s < 0) or refreeze (s > 0) the selected rows in place: every crystal's d^2 moves
    by one common amount s (um^2), the diffusion-limited rule (module docstring).

    Newton's method on V(s) = v_target, using dV/ds = (3/2) sum n d, until the volume is within
    1e-7 of the target; an exact rescale then removes the last residual.
    """
    if not rows.any():
        return
    every = bool(rows.all())
    u = ub if every else ub[rows]
    n = nc if every else nc[rows]
    vt = np.maximum(v_target if every else v_target[rows], 0.0)
    _cut_dissolved(u, n)
    d = np.cbrt(u)
    d2 = d * np.abs(d)  # signed: boundaries of dissolved cells stay below zero, in order
    s = np.zeros(vt.shape)
    todo = np.ones(vt.shape, dtype=bool)
    for _ in range(_NEWTON_MAX_STEPS):
        dd = _root_signed(d2 + s[:, None])
        a, b, n_eff, d_mean = _cell_parts(dd * dd * dd, n, dd)
        f = np.einsum("rc,rc->r", n_eff, 0.5 * (a + b)) - vt
        # Each row stops on its own tolerance, so its result never depends on other rows.
        todo &= np.abs(f) > _NEWTON_RTOL * vt
        if not todo.any():
            break
        fp = 1.5 * np.einsum("rc,rc->r", n_eff, d_mean)
        with np.errstate(invalid="ignore", divide="ignore"):
            s = np.where(todo & (fp > 0), s - f / fp, s)
    else:
        f = None  # ran out of steps: the volume at the last s is not known yet
    dd = _root_signed(d2 + s[:, None])
    u[...] = dd * dd * dd
    _rescale(u, n, vt, None if f is None else f + vt)
    refill(u, n)
    if not every:
        ub[rows] = u
        nc[rows] = n


def _root_signed(q: np.ndarray) -> np.ndarray:
    """sqrt(q) for q >= 0 and -sqrt(-q) below: a boundary pushed below d^2 = 0 has dissolved and
    keeps a negative u, as the cells expect."""
    return np.sign(q) * np.sqrt(np.abs(q))


def quantile_diameter(ub: np.ndarray, nc: np.ndarray, q: float) -> np.ndarray:
    """Number-based q-quantile of diameter per row, NaN if empty."""
    a, b, n_eff, _ = _cell_parts(ub, nc)
    cum = np.cumsum(n_eff, axis=-1)
    total = cum[..., -1:]
    with np.errstate(invalid="ignore", divide="ignore"):
        target = q * total
        k = np.argmax(cum >= target - 1e-15 * total, axis=-1)[..., None]
        before = np.take_along_axis(cum - n_eff, k, axis=-1)
        nk = np.take_along_axis(n_eff, k, axis=-1)
        frac = np.clip(np.where(nk > 0, (target - before) / nk, 0.0), 0.0, 1.0)
        ak, bk = np.take_along_axis(a, k, axis=-1), np.take_along_axis(b, k, axis=-1)
        out = np.cbrt(ak + frac * (bk - ak))[..., 0]
    return np.where(total[..., 0] > 0, out, np.nan)


def volume_share_above(ub: np.ndarray, nc: np.ndarray, limit_um: float) -> np.ndarray:
    """Share of ice volume held in crystals larger than limit_um, per row."""
    a, b, n_eff, _ = _cell_parts(ub, nc)
    u_lim = limit_um**3
    lo = np.maximum(a, u_lim)
    with np.errstate(invalid="ignore", divide="ignore"):
        part = np.where(b > lo, n_eff * (b * b - lo * lo) / (2.0 * (b - a)), 0.0)
        v = np.einsum("...c,...c->...", n_eff, 0.5 * (a + b))
        return np.where(v > 0, np.nan_to_num(part).sum(axis=-1) / v, np.nan)


@lru_cache(maxsize=64)
def master_curve(
    shape: str, spread_cv: float, n_classes: int = 64, rel_tol: float = 0.02
) -> tuple[np.ndarray, np.ndarray]:
    """(theta / L0^3, L / L0) for an isothermal run from a unit-mean population (computed once
    per distinct shape; the arrays are read-only)."""
    ub, w = initial_cells(1.0, spread_cv, shape, n_classes)
    u = ub[None].copy()
    n = w[None].copy()
    thetas = [0.0]
    ratios = [1.0]
    # Geometric steps in theta resolve the fast start and reach L = 12 L0 in MASTER_POINTS.
    grid = np.geomspace(1e-4, MASTER_MAX_RATIO**3, MASTER_POINTS)
    last = 0.0
    for theta in grid:
        lsw_advance(u, n, np.array([theta - last]), rel_tol)
        last = theta
        thetas.append(theta)
        ratios.append(float(mean_diameter(u, n)[0]))
    th, ratio = np.array(thetas), np.array(ratios)
    th.flags.writeable = False
    ratio.flags.writeable = False
    return th, ratio


def reduced_time_to(master: tuple[np.ndarray, np.ndarray], ratio) -> np.ndarray:
    """theta / L0^3 at which an isothermal run from the master curve's start reaches the mean
    diameter ratio L / L0 (the cube law beyond the curve's end). The number-mean may dip at
    the very start of a broad distribution, so the curve is read as its running maximum."""
    th, r = master
    mono = np.maximum.accumulate(r)
    x = np.asarray(ratio, dtype=float)
    inside = np.interp(x, mono, th)
    return np.where(x <= mono[-1], inside, th[-1] + LSW_A_OVER_K * (x**3 - mono[-1] ** 3))


def ratio_at(master: tuple[np.ndarray, np.ndarray], theta) -> np.ndarray:
    """L / L0 after reduced time theta / L0^3 on the master curve (its running maximum; the
    cube law beyond its end): the inverse of ``reduced_time_to``."""
    th, r = master
    mono = np.maximum.accumulate(r)
    t = np.asarray(theta, dtype=float)
    inside = np.interp(t, th, mono)
    return np.where(t <= th[-1], inside, np.cbrt(mono[-1] ** 3 + np.maximum(t - th[-1], 0.0) / LSW_A_OVER_K))

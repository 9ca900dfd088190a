"""The one integrator: air (and probe) temperature series in, crystal populations out.

Both batch replay and the live service call ``advance``; feeding a history in one call or
sample by sample gives the same state, because

* each sample's air value is held until the next sample (zero-order hold), and the product
  lag is exact for held input at any dt;
* the populations are stepped on a fixed grid of "macro" intervals aligned to multiples of
  ``Spec.macro_s`` in absolute time, whatever the sampling; what a call leaves of an open
  macro is kept in the state (reduced time so far, lowest ice fraction so far);
* within a macro, the reduced time theta = integral a_d(T_product) dt is integrated with
  Simpson's rule on every sub-interval, and a population step applies, in order: melting down
  to the lowest ice fraction reached, LSW coarsening by theta, refreezing to the ice fraction
  at the macro's end.

Rows: each zone has one population per exposure position plus one counterfactual population
held at the zone's setpoint from the first sample on; excess growth is the difference.
Figures describe the settled population: ice that is melted at the moment (a defrost, an
open door) is refrozen, on a copy, onto the surviving crystals at the zone's setpoint, which is
what the product will hold once it is cold again. So a warm spell shows as the lasting damage
it does, never as a temporary shrinking of the crystals. The texture budget is committed at
the end of each macro interval (each full hour of data by default) as a running maximum:
texture damage does not heal, and a figure once reported is never taken back.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, fields, replace

import numpy as np

from watcher.errors import ModelError
from watcher.model import population as pop
from watcher.model.ahead import SECONDS_PER_DAY, ahead_of
from watcher.model.icefraction import ice_fraction
from watcher.model.kinetics import LSW_A_OVER_K, rate_um3_per_day
from watcher.model.profiles import Profile
from watcher.model.thermal import lag_series

#: Ice-volume changes smaller than this share are carried to the next macro step instead of
#: melting or refreezing now: 3e-4 of the volume is a shell of 1e-4 of a diameter (0.004 um at
#: 40 um). It spares the Newton solves that sensor noise would otherwise cost every hour; the
#: budget moves by under 0.1 % against a tolerance of 1e-4 (bench data, 3 weeks).
ICE_TOL = 3e-4


@dataclass(frozen=True)
class Position:
    """An exposure position: a first-order lag of air (tau_s), or the zone's product probe."""

    name: str
    tau_s: float = 3600.0
    probe: bool = False


DEFAULT_POSITIONS = (Position("surface", 3600.0), Position("core", 8 * 3600.0))


@dataclass(frozen=True)
class Spec:
    """Everything fixed about a group of zones that share one profile and position set."""

    profile: Profile
    positions: tuple[Position, ...] = DEFAULT_POSITIONS
    n_classes: int = 64
    macro_s: float = 3600.0
    rel_tol: float = 0.02
    #: False holds the ice at its amount at the start of each step (no melt, no refreeze):
    #: the same history without melt-refreeze, to show what part of a cost it is.
    melt_refreeze: bool = True

    def __post_init__(self) -> None:
        if not self.positions:
            raise ModelError("a zone needs at least one exposure position")
        for p in self.positions:
            if not p.probe and not (p.tau_s > 0 and math.isfinite(p.tau_s)):
                raise ModelError(f"position {p.name!r}: tau_s must be a positive number, got {p.tau_s!r}")

    @property
    def master(self) -> tuple[np.ndarray, np.ndarray]:
        """The profile's isothermal master curve (theta / L0^3, L / L0), computed once per
        distinct shape (zones sharing a profile share it)."""
        ini = self.profile.initial
        return pop.master_curve(ini.shape, ini.spread_cv, self.n_classes, self.rel_tol)

    @property
    def panel_s(self) -> float:
        """Longest quadrature panel: a twelfth of the fastest lag, so Simpson's rule stays
        accurate when the sampling is coarse (1-minute data are never subdivided)."""
        taus = [p.tau_s for p in self.positions if not p.probe]
        return min(taus) / 12.0 if taus else self.macro_s

    @property
    def probe_index(self) -> np.ndarray:
        return np.array([i for i, p in enumerate(self.positions) if p.probe], dtype=int)

    def rate_um3_per_s(self, temp_c) -> np.ndarray:
        """a_d(T) of the growth law in um^3/s (a_d = 9/4 K)."""
        k = rate_um3_per_day(self.profile.kinetics, temp_c, self.profile.ice.initial_freezing_point_c)
        return LSW_A_OVER_K * k / SECONDS_PER_DAY

    def ice(self, temp_c) -> np.ndarray:
        ice = self.profile.ice
        return ice_fraction(temp_c, ice.water_fraction, ice.bound_water_fraction, ice.initial_freezing_point_c)


# State's field names in checkpoints written before instants were named `_ts`.
LEGACY_FIELDS = {"t_s": "time_ts", "thawed_at_s": "thawed_ts"}


@dataclass
class State:
    """Integrator state for Z zones, P positions (R = P + 1 rows with the counterfactual)."""

    time_ts: float
    setpoint_c: np.ndarray  # (Z,)
    air_c: np.ndarray  # (Z,) air value held since time_ts
    probe_c: np.ndarray  # (Z,) last probe value, NaN before any
    product_c: np.ndarray  # (Z, P) product temperature at time_ts
    ub: np.ndarray  # (Z, R, C+1) class-cell boundaries in u = d^3, um^3
    nc: np.ndarray  # (Z, R, C) class number weights
    acc_theta: np.ndarray  # (Z, R) reduced time of the open macro, um^3
    acc_ice_min: np.ndarray  # (Z, P) lowest ice fraction in the open macro
    peak_budget: np.ndarray  # (Z, R) running maximum of the budget fraction
    thawed_ts: np.ndarray  # (Z, P) time the position thawed, NaN if never
    l0_um: float = 35.0

    def copy(self) -> State:
        return replace(
            self,
            **{
                f.name: getattr(self, f.name).copy()
                for f in fields(self)
                if isinstance(getattr(self, f.name), np.ndarray)
            },
        )

    def arrays(self) -> dict[str, np.ndarray]:
        """All fields as arrays (for checkpoints); ``from_arrays`` inverts it."""
        return {f.name: np.asarray(getattr(self, f.name)) for f in fields(self)}

    @classmethod
    def from_arrays(cls, data: dict) -> State:
        data = {LEGACY_FIELDS.get(k, k): v for k, v in data.items()}  # checkpoints written before the rename
        kw = {f.name: np.array(data[f.name]) for f in fields(cls)}
        kw["time_ts"] = float(kw["time_ts"])
        kw["l0_um"] = float(kw["l0_um"])
        return cls(**kw)


@dataclass
class Trace:
    """Values at the end of every completed macro interval of one ``advance`` call, and the
    product temperature at every sample time (what a rule on it is judged at)."""

    time_ts: np.ndarray = field(default_factory=lambda: np.empty(0))
    mean_diameter_um: np.ndarray = field(default_factory=lambda: np.empty((0, 0, 0)))  # (T, Z, R)
    budget_fraction: np.ndarray = field(default_factory=lambda: np.empty((0, 0, 0)))  # (T, Z, R)
    product_c: np.ndarray = field(default_factory=lambda: np.empty((0, 0, 0)))  # (T, Z, P)
    sample_ts: np.ndarray = field(default_factory=lambda: np.empty(0))  # (K,) the samples' times
    sample_product_c: np.ndarray = field(default_factory=lambda: np.empty((0, 0, 0)))  # (K, Z, P)


def tile_state(state: State, rows: int, zone: int = 0) -> State:
    """A state of `rows` identical zones copied from one zone of another state (for running
    counterfactual histories side by side; rows never influence each other)."""
    kw = {}
    for f in fields(State):
        value = getattr(state, f.name)
        if isinstance(value, np.ndarray) and value.ndim >= 1:
            kw[f.name] = np.repeat(value[zone : zone + 1], rows, axis=0).copy()
        else:
            kw[f.name] = value
    return State(**kw)


def new_state(spec: Spec, t0_ts: float, air0_c, setpoint_c, probe0_c=None) -> State:
    """A fresh population for each zone at t0_ts; the product starts equilibrated with the air
    (or at the probe reading for probe positions)."""
    air0 = np.atleast_1d(np.asarray(air0_c, dtype=float))
    z = air0.size
    sp = np.broadcast_to(np.asarray(setpoint_c, dtype=float), (z,)).copy()
    probe0 = np.full(z, np.nan) if probe0_c is None else np.broadcast_to(np.asarray(probe0_c, dtype=float), (z,)).copy()
    n_pos = len(spec.positions)
    product = np.repeat(air0[:, None], n_pos, axis=1)
    pi = spec.probe_index
    if pi.size:
        product[:, pi] = np.where(np.isnan(probe0), air0, probe0)[:, None]
    ini = spec.profile.initial
    ub0, w = pop.initial_cells(ini.mean_diameter_um, ini.spread_cv, ini.shape, spec.n_classes)
    # The fresh distribution is the product as hardened and held at the setpoint; a product
    # that starts warmer melts down to its own ice fraction in the first macro step.
    ice_set = np.repeat(spec.ice(sp)[:, None], n_pos + 1, axis=1)  # (Z, R)
    ice_now = spec.ice(product)
    v_unit = float(pop.volume(ub0[None], w[None])[0])
    n = (w / v_unit)[None, None, :] * ice_set[..., None]
    u = np.broadcast_to(ub0, ice_set.shape + ub0.shape).copy()
    gone = np.concatenate([ice_now <= 0, (ice_set[:, -1:] <= 0)], axis=1)
    n[gone] = 0.0
    thawed = np.where(gone[:, :n_pos], float(t0_ts), np.nan)
    return State(
        time_ts=float(t0_ts),
        setpoint_c=sp,
        air_c=air0.copy(),
        probe_c=probe0,
        product_c=product,
        ub=u,
        nc=n,
        acc_theta=np.zeros((z, n_pos + 1)),
        acc_ice_min=ice_now.copy(),
        peak_budget=np.zeros((z, n_pos + 1)),
        thawed_ts=thawed,
        l0_um=float(ini.mean_diameter_um),
    )


def _budget_fraction(spec: Spec, mean_um: np.ndarray) -> np.ndarray:
    l0 = spec.profile.initial.mean_diameter_um
    lim = spec.profile.limit_mean_diameter_um
    return (mean_um**3 - l0**3) / (lim**3 - l0**3)


def _settled(
    spec: Spec, u: np.ndarray, n: np.ndarray, setpoint_c: np.ndarray, n_pos: int
) -> tuple[np.ndarray, np.ndarray]:
    """Copies of the rows brought to the reference ice fraction: the ice melted now refrozen
    onto the survivors (the crystals a warm spell leaves behind once the product is cold
    again), and the extra ice of a product colder than the reference melted back off, so that
    more ice in a colder product does not count as coarsening.

    The reference is the ice held by the zone's counterfactual row: the ice fraction of the
    setpoint the population started at. For a zone that is its setpoint; a lot moved to a
    colder room keeps the reference of its first room, so the extra ice the colder room
    freezes onto its crystals is not read as coarsening either."""
    z = setpoint_c.size
    u2, n2 = u.copy(), n.copy()
    v = pop.volume(u2, n2)
    ref = v.reshape(z, n_pos + 1)[:, n_pos]
    target = np.repeat(np.where(ref > 0, ref, spec.ice(setpoint_c)), n_pos + 1)
    off = ((target > v * (1.0 + ICE_TOL)) | (target < v * (1.0 - ICE_TOL))) & (v > 0)
    off.reshape(z, n_pos + 1)[:, n_pos] = False  # the counterfactual is the reference
    # Extra ice comes off by the same diffusion rule that froze it on (d^2 down by one amount),
    # so a colder spell's freezing and this settling undo each other; scaling every crystal in
    # proportion instead would leave the small crystals' gain from the d^2 refreeze in place
    # and read a colder product as coarser (found by the what-if hypothesis test).
    pop.shift_to_volume(u2, n2, target, off)
    return u2, n2


def _population_step(spec: Spec, u, n, theta, ice_min, ice_end) -> None:
    """One macro step in place on flattened rows: melt, coarsen, refreeze."""
    if not spec.melt_refreeze:
        pop.lsw_advance(u, n, theta, spec.rel_tol)
        return
    v = pop.volume(u, n)
    melt = ice_min < v * (1.0 - ICE_TOL)
    pop.shift_to_volume(u, n, ice_min, melt)
    # Melting leaves exactly the target volume and coarsening conserves it: no recount needed.
    v = np.where(melt, np.maximum(ice_min, 0.0), v)
    pop.lsw_advance(u, n, theta, spec.rel_tol)
    pop.shift_to_volume(u, n, ice_end, (ice_end > v * (1.0 + ICE_TOL)) & (v > 0))


def _product_paths(spec: Spec, state: State, air: np.ndarray, probe_in: np.ndarray, dt: np.ndarray):
    """Product temperature at grid points (Z,P,J+1) and reduced-time increments (Z,P,J)."""
    z, n_int = air.shape
    n_pos = len(spec.positions)
    temp = np.empty((z, n_pos, n_int + 1))
    theta = np.empty((z, n_pos, n_int))
    li = [i for i, p in enumerate(spec.positions) if not p.probe]
    pi = spec.probe_index
    for i in li:
        tau = spec.positions[i].tau_s
        path = lag_series(state.product_c[:, i], air, dt, tau)
        mid = air + (path[:, :-1] - air) * np.exp(-0.5 * dt / tau)
        a_grid = spec.rate_um3_per_s(path)
        a_mid = spec.rate_um3_per_s(mid)
        temp[:, i] = path
        theta[:, i] = dt / 6.0 * (a_grid[:, :-1] + 4.0 * a_mid + a_grid[:, 1:])
    if pi.size:
        held = np.where(np.isnan(probe_in), air, probe_in)  # (Z, J)
        temp[:, pi, 0] = state.product_c[:, pi]
        temp[:, pi, 1:] = held[:, None, :]
        theta[:, pi] = (spec.rate_um3_per_s(held) * dt)[:, None, :]
    return temp, theta


def advance(spec: Spec, state: State, time_ts, air_c, probe_c=None, trace: bool = False) -> tuple[State, Trace | None]:
    """Integrate samples (time_ts: (K,), air_c: (Z, K), probe_c: (Z, K) with NaN for none).

    Returns a new state (the input state is not modified) and, when asked, a Trace.
    """
    st = state.copy()
    t = np.asarray(time_ts, dtype=float)
    air_new = np.asarray(air_c, dtype=float).reshape(st.air_c.size, -1)
    if t.size == 0:
        return st, (Trace() if trace else None)
    if t[0] <= st.time_ts or (t.size > 1 and np.any(np.diff(t) <= 0)):
        raise ModelError(f"sample times must increase strictly after {st.time_ts}; got {t[:3]}...")
    if not np.all(np.isfinite(air_new)):
        raise ModelError("air temperatures must be finite numbers")
    macro = spec.macro_s
    k0 = math.floor(st.time_ts / macro) + 1
    k1 = math.ceil(t[-1] / macro)
    bounds = np.arange(k0, k1, dtype=np.float64) * macro
    grid = _refine(np.concatenate(([st.time_ts], np.union1d(t, bounds))), spec.panel_s)
    dt = np.diff(grid)
    idx = np.searchsorted(t, grid[:-1], side="right")  # samples at or before each start
    air = np.concatenate([st.air_c[:, None], air_new], axis=1)[:, idx]
    probe_ext = np.concatenate(
        [
            st.probe_c[:, None],
            np.full_like(air_new, np.nan)
            if probe_c is None
            else np.asarray(probe_c, dtype=float).reshape(air_new.shape),
        ],
        axis=1,
    )
    probe_ext = _ffill(probe_ext)
    probe_in = probe_ext[:, idx]
    temp, theta = _product_paths(spec, st, air, probe_in, dt)
    ice = spec.ice(temp[..., 1:])  # (Z, P, J) at the end of each sub-interval
    theta_cf = spec.rate_um3_per_s(st.setpoint_c)[:, None] * dt[None, :]
    theta_all = np.concatenate([theta, theta_cf[:, None, :]], axis=1)  # (Z, R, J)

    macro_id = np.floor(grid[:-1] / macro).astype(np.int64)
    starts = np.flatnonzero(np.r_[True, macro_id[1:] != macro_id[:-1]])
    ends = np.r_[starts[1:] - 1, macro_id.size - 1]
    theta_seg = np.add.reduceat(theta_all, starts, axis=-1)
    ice_min_seg = np.minimum.reduceat(ice, starts, axis=-1)
    ice_end_seg = ice[..., ends]
    theta_seg[..., 0] += st.acc_theta
    ice_min_seg[..., 0] = np.minimum(ice_min_seg[..., 0], st.acc_ice_min)
    last_complete = grid[-1] == (macro_id[-1] + 1) * macro
    n_complete = starts.size if last_complete else starts.size - 1

    z, n_pos = st.product_c.shape
    rows = z * (n_pos + 1)
    u = st.ub.reshape(rows, -1)
    n = st.nc.reshape(rows, -1)
    inf_col = np.full((z, 1), np.inf)
    rec: list[tuple] = []
    for s in range(n_complete):
        ice_min = np.concatenate([ice_min_seg[..., s], inf_col], axis=1).reshape(rows)
        ice_end = np.concatenate([ice_end_seg[..., s], -inf_col], axis=1).reshape(rows)
        _population_step(spec, u, n, theta_seg[..., s].reshape(rows), ice_min, ice_end)
        t_end = grid[ends[s] + 1]
        mean = pop.mean_diameter(*_settled(spec, u, n, st.setpoint_c, n_pos)).reshape(z, n_pos + 1)
        st.peak_budget = np.fmax(st.peak_budget, _budget_fraction(spec, mean))
        newly = (pop.count(u, n).reshape(z, n_pos + 1)[:, :n_pos] <= 0) & np.isnan(st.thawed_ts)
        st.thawed_ts[newly] = t_end
        if trace:
            rec.append((t_end, mean, st.peak_budget.copy(), temp[..., ends[s] + 1]))
    if last_complete:
        st.acc_theta = np.zeros_like(st.acc_theta)
        st.acc_ice_min = np.full_like(st.acc_ice_min, np.inf)
    else:
        st.acc_theta = theta_seg[..., -1].copy()
        st.acc_ice_min = ice_min_seg[..., -1].copy()
    st.time_ts = float(t[-1])
    st.air_c = air_new[:, -1].copy()
    st.probe_c = probe_ext[:, -1].copy()
    st.product_c = temp[..., -1].copy()
    pi = spec.probe_index
    if pi.size:
        st.product_c[:, pi] = np.where(np.isnan(st.probe_c), st.air_c, st.probe_c)[:, None]
    out_trace = None
    if trace:
        at_samples = temp[..., np.searchsorted(grid, t)]  # (Z, P, K): every sample time is a grid point
        if pi.size:  # a probe position reads its probe (or the air) at the sample itself
            at_samples[:, pi, :] = np.where(np.isnan(probe_ext[:, 1:]), air_new, probe_ext[:, 1:])[:, None, :]
        out_trace = Trace(
            time_ts=np.array([r[0] for r in rec]),
            mean_diameter_um=np.array([r[1] for r in rec]).reshape(len(rec), z, n_pos + 1),
            budget_fraction=np.array([r[2] for r in rec]).reshape(len(rec), z, n_pos + 1),
            product_c=np.array([r[3] for r in rec]).reshape(len(rec), z, n_pos),
            sample_ts=t.copy(),
            sample_product_c=np.moveaxis(at_samples, -1, 0),
        )
    return st, out_trace


def _refine(grid: np.ndarray, panel_s: float) -> np.ndarray:
    """Subdivide grid intervals longer than panel_s into equal pieces."""
    dt = np.diff(grid)
    pieces = np.maximum(np.ceil(dt / panel_s - 1e-9), 1).astype(np.int64)
    if (pieces == 1).all():
        return grid
    start = np.repeat(grid[:-1], pieces)
    step = np.repeat(dt / pieces, pieces)
    k = np.arange(pieces.sum()) - np.repeat(np.cumsum(pieces) - pieces, pieces)
    return np.append(start + k * step, grid[-1])


def _ffill(a: np.ndarray) -> np.ndarray:
    """Forward-fill NaN along the last axis."""
    valid = ~np.isnan(a)
    idx = np.where(valid, np.arange(a.shape[-1]), 0)
    np.maximum.accumulate(idx, axis=-1, out=idx)
    return np.take_along_axis(a, idx, axis=-1)


def outputs(spec: Spec, state: State) -> dict[str, np.ndarray]:
    """The figures of section 5 per zone and position at state.time_ts, open macro included.

    Keys (arrays of shape (Z, P) unless noted): mean_diameter_um, d90_um,
    share_above_limit (volume share of crystals above the limit), budget_used_pct,
    growth_rate_um_per_day and days_to_limit (from the isothermal master curve at the current
    size and product temperature), their 90 % ranges from the profile's rate factor
    (budget_used_pct_low/_high, days_to_limit_low/_high: _low days is the cautious end),
    excess_growth_um (versus the setpoint counterfactual), product_c, thawed
    (bool), setpoint_mean_diameter_um (Z,).
    """
    z, n_pos = state.product_c.shape
    rows = z * (n_pos + 1)
    u = state.ub.reshape(rows, -1).copy()
    n = state.nc.reshape(rows, -1).copy()
    ice_now = spec.ice(state.product_c)
    ice_min = np.concatenate([np.minimum(state.acc_ice_min, ice_now), np.full((z, 1), np.inf)], axis=1).reshape(rows)
    ice_end = np.concatenate([ice_now, np.full((z, 1), -np.inf)], axis=1).reshape(rows)
    _population_step(spec, u, n, state.acc_theta.reshape(rows), ice_min, ice_end)
    u, n = _settled(spec, u, n, state.setpoint_c, n_pos)
    mean = pop.mean_diameter(u, n).reshape(z, n_pos + 1)
    budget = np.maximum(state.peak_budget, 0.0)
    shape = (z, n_pos + 1)
    d90 = pop.quantile_diameter(u, n, 0.9).reshape(shape)
    lim = spec.profile.limit_mean_diameter_um
    share = pop.volume_share_above(u, n, lim).reshape(shape)
    lm = mean[:, :n_pos]
    ahead = ahead_of(spec, lm, state.product_c)
    budget_pct = 100.0 * budget[:, :n_pos]
    thawed = ~np.isnan(state.thawed_ts) | (state.product_c >= spec.profile.ice.initial_freezing_point_c)
    nan = np.nan
    return {
        "mean_diameter_um": np.where(thawed, nan, lm),
        "d90_um": np.where(thawed, nan, d90[:, :n_pos]),
        "share_above_limit": np.where(thawed, nan, share[:, :n_pos]),
        "budget_used_pct": np.where(thawed, nan, budget_pct),
        "budget_used_pct_low": np.where(thawed, nan, np.minimum(budget_pct, ahead["budget_low"])),
        "budget_used_pct_high": np.where(thawed, nan, np.maximum(budget_pct, ahead["budget_high"])),
        "growth_rate_um_per_day": np.where(thawed, nan, ahead["growth"]),
        "days_to_limit": np.where(thawed, nan, ahead["days"]),
        "days_to_limit_low": np.where(thawed, nan, np.minimum(ahead["days"], ahead["days_low"])),
        "days_to_limit_high": np.where(thawed, nan, np.maximum(ahead["days"], ahead["days_high"])),
        "excess_growth_um": np.where(thawed, nan, lm - mean[:, n_pos:]),
        "product_c": state.product_c.copy(),
        "thawed": thawed,
        "setpoint_mean_diameter_um": mean[:, n_pos],
    }

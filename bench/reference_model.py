"""A plain per-sample, pure-Python implementation of watcher's model, for benchmarking only.

Same algorithm as watcher.model (hold-last air input, exact product lag, Simpson reduced time,
hourly macro steps of melt / LSW on moving cells / refreeze, refill by splitting, settled
budget), written one zone, one sample and one cell at a time with the math module. It is the
speed reference of bench/model_throughput.py and a cross-check of the vectorised code.
"""

from __future__ import annotations

import math

from watcher.model.integrator import ICE_TOL as TOL_ICE  # the same tolerances as the vectorised code
from watcher.model.population import _NEWTON_RTOL as NEWTON_RTOL

R = 8.314462618


def cbrt(x: float) -> float:
    return math.copysign(abs(x) ** (1.0 / 3.0), x)


class Model:
    def __init__(self, profile, taus_s, n_classes=64, macro_s=3600.0, rel_tol=0.02):
        from watcher.model.population import initial_cells

        self.p = profile
        self.taus = list(taus_s)
        self.macro = macro_s
        self.rel_tol = rel_tol
        self.panel = min(self.taus) / 12.0
        ub, w = initial_cells(
            profile.initial.mean_diameter_um, profile.initial.spread_cv, profile.initial.shape, n_classes
        )
        self.ub0 = [float(x) for x in ub]
        self.w0 = [float(x) for x in w]

    # --- physics -------------------------------------------------------------------------
    def rate(self, t_c: float) -> float:
        k = self.p.kinetics
        t = min(t_c, self.p.ice.initial_freezing_point_c)
        val = k.k_ref_um3_per_day * math.exp(
            -k.activation_energy_kj_per_mol * 1000.0 / R * (1.0 / (t + 273.15) - 1.0 / (k.ref_temp_c + 273.15))
        )
        taper = min(max((t - k.tg_prime_c) / 2.0, 0.0), 1.0)
        return 2.25 * val * taper / 86400.0

    def ice(self, t_c: float) -> float:
        i = self.p.ice
        if t_c >= i.initial_freezing_point_c:
            return 0.0
        return (i.water_fraction - i.bound_water_fraction) * (1.0 - i.initial_freezing_point_c / t_c)

    # --- cells ---------------------------------------------------------------------------
    @staticmethod
    def parts(ub, nc):
        out = []
        for k in range(len(nc)):
            lo, hi = ub[k], ub[k + 1]
            a, b = max(lo, 0.0), max(hi, 0.0)
            span, width = b - a, hi - lo
            n_eff = nc[k] * span / width if width > 0 else 0.0
            d_mean = 0.75 * (b * max(cbrt(hi), 0.0) - a * max(cbrt(lo), 0.0)) / span if span > 0 else 0.0
            out.append((a, b, n_eff, d_mean))
        return out

    def volume(self, ub, nc):
        return sum(n * 0.5 * (a + b) for a, b, n, _ in self.parts(ub, nc))

    def mean(self, ub, nc):
        parts = self.parts(ub, nc)
        total = sum(p[2] for p in parts)
        return sum(p[2] * p[3] for p in parts) / total if total > 0 else math.nan

    def velocity(self, ub, nc):
        d_bar = self.mean(ub, nc)
        if not d_bar > 0:
            return [0.0] * len(ub)
        return [3.0 * (cbrt(u) / d_bar - 1.0) for u in ub]

    def rescale(self, ub, nc, target, v_now=None):
        v_now = self.volume(ub, nc) if v_now is None else v_now
        if v_now <= 0 or target <= 0:
            for k in range(len(nc)):
                nc[k] = 0.0
            return
        f = target / v_now
        for k in range(len(ub)):
            ub[k] *= f

    def refill(self, ub, nc):
        c = len(nc)
        live = sum(1 for x in ub[1:] if x > 0)
        if not (live < 0.75 * c and live > 0 and sum(nc) > 0):
            return
        first = next(i for i, x in enumerate(ub[1:]) if x > 0)
        bounds, weights = ub[first:], nc[first:]
        while len(weights) < c:
            d = [cbrt(max(x, 0.0)) for x in bounds]
            k = min(c - len(weights), len(weights))
            widths = [d[i + 1] - d[i] for i in range(len(weights))]
            widest = sorted(sorted(range(len(widths)), key=lambda i: -widths[i])[:k])
            for i in reversed(widest):
                mid = 0.5 * (bounds[i] + bounds[i + 1])
                half = 0.5 * weights[i]
                bounds.insert(i + 1, mid)
                weights[i] = half
                weights.insert(i + 1, half)
        ub[:], nc[:] = bounds, weights

    def lsw(self, ub, nc, theta):
        parts = self.parts(ub, nc)
        v0 = sum(n * 0.5 * (a + b) for a, b, n, _ in parts)
        n_now = sum(p[2] for p in parts)
        if not (theta > 0 and n_now > 0 and v0 > 0):
            return
        steps = max(math.ceil(3.0 * theta / (self.rel_tol * v0 / n_now)), 1)
        h = theta / steps
        for _ in range(steps):
            k1 = self.velocity(ub, nc)
            k2 = self.velocity([u + 0.5 * h * k for u, k in zip(ub, k1)], nc)
            for i in range(len(ub)):
                ub[i] += h * k2[i]
            self.rescale(ub, nc, v0)
        self.refill(ub, nc)

    def shift(self, ub, nc, target):
        for k in range(len(nc)):  # dissolution is permanent
            lo, hi = ub[k], ub[k + 1]
            if hi <= 0:
                nc[k] = 0.0
            elif lo < 0:
                nc[k] *= hi / (hi - lo)
                ub[k] = 0.0
        target = max(target, 0.0)
        d2 = [cbrt(u) * abs(cbrt(u)) for u in ub]  # every crystal's signed d^2 moves by one amount s

        def moved(s):
            return [math.copysign(math.sqrt(abs(x + s)), x + s) ** 3 for x in d2]

        s, f = 0.0, None
        for _ in range(12):
            trial = moved(s)
            parts = self.parts(trial, nc)
            f = sum(n * 0.5 * (a + b) for a, b, n, _ in parts) - target
            if abs(f) <= NEWTON_RTOL * target:
                break
            fp = 1.5 * sum(n * dm for _, _, n, dm in parts)
            if fp > 0:
                s -= f / fp
            f = None
        ub[:] = moved(s)
        self.rescale(ub, nc, target, None if f is None else f + target)
        self.refill(ub, nc)

    # --- one zone ------------------------------------------------------------------------
    def new_zone(self, t0, air0, setpoint):
        rows = len(self.taus) + 1
        v_unit = self.volume(self.ub0, self.w0)
        ice_set = self.ice(setpoint)
        return {
            "t": t0,
            "air": air0,
            "sp": setpoint,
            "temp": [air0] * len(self.taus),
            "ub": [list(self.ub0) for _ in range(rows)],
            "nc": [[w / v_unit * ice_set for w in self.w0] for _ in range(rows)],
            "acc_theta": [0.0] * rows,
            "acc_ice": [self.ice(air0)] * len(self.taus),
            "peak": [0.0] * rows,
        }

    def _macro_step(self, z):
        n_pos = len(self.taus)
        for r in range(n_pos + 1):
            ub, nc = z["ub"][r], z["nc"][r]
            ice_min = z["acc_ice"][r] if r < n_pos else math.inf
            ice_end = self.ice(z["temp"][r]) if r < n_pos else -math.inf
            v = self.volume(ub, nc)
            if ice_min < v * (1 - TOL_ICE):
                self.shift(ub, nc, ice_min)
                v = max(ice_min, 0.0)
            self.lsw(ub, nc, z["acc_theta"][r])
            if ice_end > v * (1 + TOL_ICE) and v > 0:
                self.shift(ub, nc, ice_end)
            s_ub, s_nc = list(ub), list(nc)
            target = self.ice(z["sp"])
            vs = self.volume(s_ub, s_nc)
            if r < n_pos and target > vs * (1 + TOL_ICE) and vs > 0:
                self.shift(s_ub, s_nc, target)
            mean = self.mean(s_ub, s_nc)
            l0, lim = self.p.initial.mean_diameter_um, self.p.limit_mean_diameter_um
            if mean == mean:
                z["peak"][r] = max(z["peak"][r], (mean**3 - l0**3) / (lim**3 - l0**3))
        z["acc_theta"] = [0.0] * (n_pos + 1)
        z["acc_ice"] = [math.inf] * n_pos

    def sample(self, z, t_new, air_new):
        """Feed one sample: integrate the interval since the last one with the held air."""
        t0 = z["t"]
        cuts = [t0]
        k = math.floor(t0 / self.macro) + 1
        while k * self.macro < t_new:
            cuts.append(k * self.macro)
            k += 1
        cuts.append(t_new)
        for g0, g1 in zip(cuts[:-1], cuts[1:]):
            pieces = max(math.ceil((g1 - g0) / self.panel - 1e-9), 1)
            for j in range(pieces):
                a0 = g0 + (g1 - g0) * j / pieces
                a1 = g0 + (g1 - g0) * (j + 1) / pieces if j + 1 < pieces else g1
                dt = a1 - a0
                for i, tau in enumerate(self.taus):
                    t_start = z["temp"][i]
                    t_end = z["air"] + (t_start - z["air"]) * math.exp(-dt / tau)
                    t_mid = z["air"] + (t_start - z["air"]) * math.exp(-0.5 * dt / tau)
                    z["acc_theta"][i] += dt / 6.0 * (self.rate(t_start) + 4.0 * self.rate(t_mid) + self.rate(t_end))
                    z["acc_ice"][i] = min(z["acc_ice"][i], self.ice(t_end))
                    z["temp"][i] = t_end
                z["acc_theta"][-1] += self.rate(z["sp"]) * dt
            if g1 == math.floor(g0 / self.macro) * self.macro + self.macro:
                self._macro_step(z)
        z["t"], z["air"] = t_new, air_new

    def mean_now(self, z, row):
        return self.mean(z["ub"][row], z["nc"][row])

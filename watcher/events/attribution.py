"""What each event cost: excess crystal growth against the setpoint counterfactual. Pure.

For every event, the counterfactual is the same history with the air held at the zone's
setpoint while the event lasted. Both run through the one integrator, side by side as rows of
one call (rows never influence each other, so this is exact, not an approximation), and the
event's cost is the difference in settled mean diameter at the end of the window, which should
lie beyond the event's recovery tail (by default three times the slowest lag, when the product
has relaxed back; costs measured earlier are flagged unsettled). Costs of events close
together interact, so per-event costs need not add up to the zone's total excess; the
remainder is reported as unattributed.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from watcher.events.detect import Event
from watcher.model.integrator import Spec, State, advance, outputs, tile_state


@dataclass(frozen=True)
class EventCost:
    event: Event
    excess_um: float  # worst position, at the end of the window
    budget_share_pct: float  # the same difference as a share of the texture budget (persists)
    excess_by_position_um: dict[str, float]
    settled: bool  # False when the window ends before the event's recovery tail


def default_tail_s(spec: Spec) -> float:
    taus = [p.tau_s for p in spec.positions if not p.probe]
    return 3.0 * max(taus) if taus else 3600.0


def attribute(
    spec: Spec, start: State, t_s, air_c, setpoint_c: float, events: list[Event], tail_s: float | None = None
) -> tuple[list[EventCost], dict]:
    """Costs of `events` over the history (t_s, air_c) that follows `start` (one zone).

    All rows are compared at the end of the window. Excess in um is what a microscope would
    see then; it slowly shrinks as crystals grow (the same ice spread on larger crystals), while
    the budget share, on L^3, persists. Returns the costs and a summary: total excess against
    holding the setpoint, the sum of event costs and the unattributed remainder.
    """
    t = np.asarray(t_s, float)
    air = np.asarray(air_c, float)
    tail = default_tail_s(spec) if tail_s is None else tail_s
    rows = len(events) + 1
    air_rows = np.repeat(air[None, :], rows, axis=0)
    # A sample at t_k holds until t_{k+1}: replace every sample whose hold overlaps the event.
    prev = np.concatenate(([start.t_s], t[:-1]))
    for k, e in enumerate(events, start=1):
        end = e.end_s if e.end_s is not None else t[-1]
        air_rows[k, (t > e.start_s) & (prev < end)] = setpoint_c
    state, _ = advance(spec, tile_state(start, rows), t, air_rows)
    out = outputs(spec, state)
    mean = out["mean_diameter_um"]  # (rows, P), settled
    l0, lim = spec.profile.initial.mean_diameter_um, spec.profile.limit_mean_diameter_um
    span = lim**3 - l0**3
    costs = []
    for k, e in enumerate(events, start=1):
        diff = mean[0] - mean[k]
        share = 100.0 * (mean[0] ** 3 - mean[k] ** 3) / span
        worst = int(np.nanargmax(share))
        end = e.end_s if e.end_s is not None else t[-1]
        costs.append(
            EventCost(
                e,
                float(diff[worst]),
                float(share[worst]),
                {p.name: float(d) for p, d in zip(spec.positions, diff)},
                bool(end + tail <= t[-1]),
            )
        )
    worst = int(np.nanargmax(out["excess_growth_um"][0]))
    total = float(out["excess_growth_um"][0, worst])
    attributed = float(sum(c.excess_by_position_um[spec.positions[worst].name] for c in costs))
    return costs, {
        "total_excess_um": total,
        "attributed_um": attributed,
        "unattributed_um": total - attributed,
        "position": spec.positions[worst].name,
    }

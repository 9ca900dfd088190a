"""Benchmark: integrate one year of 1-minute air samples for 100 zones (52.6 M zone-samples).

Prints the vectorised model's zone-samples per second, and its ratio to the plain per-sample
pure-Python reference (bench/reference_model.py) run in the same process on a short slice.
The slice is also run through the vectorised model, and the two results are compared: the
reference is the same algorithm, so they must agree.
Usage: python bench/model_throughput.py [--zones 100] [--days 365] [--repeats 3]
"""

from __future__ import annotations

import argparse
import statistics
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from reference_model import Model  # noqa: E402

from watcher.files.profiles import load_profile  # noqa: E402
from watcher.model.integrator import Spec, advance, new_state  # noqa: E402

START = 1_767_225_600.0  # 2026-01-01T00:00:00Z
STEP = 60.0


def air_block(zones: int, first: int, count: int, seed: int = 11) -> tuple[np.ndarray, np.ndarray]:
    """Synthetic air: setpoint -25 C, 3 defrosts a day (+5 K, 25 min, phase per zone), noise."""
    idx = np.arange(first, first + count)
    t = START + STEP * idx
    phase = ((t[None, :] + 977.0 * np.arange(zones)[:, None]) % 28800.0) / 1500.0
    rise = 5.0 * np.clip(1.0 - np.abs(phase - 1.0), 0.0, 1.0)
    # Sensor noise as a fixed function of the sample index, so any chunking sees the same data.
    z = np.arange(zones)[:, None]
    noise = 0.2 * np.sin(0.7 * idx[None, :] + 1.3 * z + seed) * np.cos(0.013 * idx[None, :])
    return t, -25.0 + rise + noise


def run_vectorised(spec, zones, n_samples, chunk=7 * 1440):
    t0, a0 = air_block(zones, 0, 1)
    state = new_state(spec, t0[0], a0[:, 0], -25.0)
    done = 1
    start = time.perf_counter()
    while done < n_samples:
        count = min(chunk, n_samples - done)
        t, air = air_block(zones, done, count)
        state, _ = advance(spec, state, t, air)
        done += count
    return time.perf_counter() - start, state


def run_reference(profile, zones, n_samples):
    model = Model(profile, [3600.0, 8 * 3600.0])
    t, air = air_block(zones, 0, n_samples)
    states = [model.new_zone(t[0], air[z, 0], -25.0) for z in range(zones)]
    start = time.perf_counter()
    for k in range(1, n_samples):
        for z in range(zones):
            model.sample(states[z], t[k], air[z, k])
    return time.perf_counter() - start, model, states


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--zones", type=int, default=100)
    ap.add_argument("--days", type=float, default=365.0)
    ap.add_argument("--slice-zones", type=int, default=2)
    ap.add_argument("--slice-days", type=float, default=2.0)
    ap.add_argument("--repeats", type=int, default=3)
    args = ap.parse_args()
    profile = load_profile(None)
    spec = Spec(profile)

    n_full = int(args.days * 1440)
    secs, _ = run_vectorised(spec, args.zones, n_full)
    full_rate = args.zones * (n_full - 1) / secs
    print(
        f"vectorised, {args.zones} zones x {args.days:g} days of 1-min samples: "
        f"{args.zones * (n_full - 1) / 1e6:.1f} M zone-samples in {secs:.1f} s = {full_rate / 1e6:.2f} M zone-samples/s"
    )

    n_slice = int(args.slice_days * 1440)
    ref_rates, vec_rates = [], []
    for _ in range(args.repeats):
        secs_ref, model, states = run_reference(profile, args.slice_zones, n_slice)
        ref_rates.append(args.slice_zones * (n_slice - 1) / secs_ref)
        secs_vec, state = run_vectorised(spec, args.slice_zones, n_slice)
        vec_rates.append(args.slice_zones * (n_slice - 1) / secs_vec)
    ref_mean = np.array([[model.mean_now(s, r) for r in range(3)] for s in states])
    vec_mean = np.array([[float(x) for x in row] for row in _means(state)])
    worst = float(np.max(np.abs(ref_mean - vec_mean) / vec_mean))
    ref_rate = statistics.median(ref_rates)
    print(
        f"pure-Python reference, {args.slice_zones} zones x {args.slice_days:g} days: "
        f"median {ref_rate:,.0f} zone-samples/s over {args.repeats} runs"
    )
    print(
        f"vectorised on the same slice: median {statistics.median(vec_rates):,.0f} zone-samples/s "
        f"(small slices pay fixed per-call costs)"
    )
    print(f"ratio, full-year vectorised rate / reference rate: {full_rate / ref_rate:,.0f}x")
    print(f"agreement on the slice (mean diameter, all rows): max relative difference {worst:.2e}")
    if worst > 1e-6:
        raise SystemExit("the reference and the vectorised model disagree")


def _means(state):
    from watcher.model.population import mean_diameter

    z, r = state.ub.shape[:2]
    return mean_diameter(state.ub.reshape(z * r, -1), state.nc.reshape(z * r, -1)).reshape(z, r)


if __name__ == "__main__":
    main()

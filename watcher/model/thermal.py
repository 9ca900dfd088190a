"""Product temperature as a first-order lag of air temperature.

For air held constant at A over an interval dt, a lumped product with time constant tau obeys
T(t + dt) = A + (T(t) - A) * exp(-dt / tau) exactly, whatever dt is. Over a whole series the
recursion T[j+1] = alpha_j T[j] + (1 - alpha_j) A[j] is evaluated in closed form in chunks:
T[j] = P_j * (T0 + sum_{i<j} (1 - alpha_i) A[i] / P_{i+1}), P_j = prod_{i<j} alpha_i, with each
chunk short enough (sum of dt/tau <= 600) that P_j cannot underflow.
"""

from __future__ import annotations

import numpy as np

_MAX_CHUNK_DECAY = 600.0


def lag_step(product_c, air_c, dt_s, tau_s):
    """Exact product temperature after dt_s of constant air_c."""
    return air_c + (product_c - air_c) * np.exp(-np.asarray(dt_s, dtype=float) / tau_s)


def lag_series(product0_c: np.ndarray, air_c: np.ndarray, dt_s: np.ndarray, tau_s: float) -> np.ndarray:
    """Product temperatures at the J+1 grid points for held air over J intervals.

    product0_c: (R,) start temperatures; air_c: (R, J) air held over each interval;
    dt_s: (J,) interval lengths; tau_s: one time constant (> 0) shared by all rows, so the
    exponentials are computed once per interval, not once per row.
    Returns (R, J+1); column 0 is product0_c.
    """
    rows, n_int = air_c.shape
    out = np.empty((rows, n_int + 1))
    out[:, 0] = product0_c
    if n_int == 0:
        return out
    decay = dt_s / tau_s
    cum = np.cumsum(decay)
    start = 0
    while start < n_int:
        base = cum[start - 1] if start else 0.0
        stop = max(int(np.searchsorted(cum, base + _MAX_CHUNK_DECAY, side="right")), start + 1)
        log_p = cum[start:stop] - base  # -log P_{i+1} within the chunk
        gain = -np.expm1(-decay[start:stop]) * np.exp(log_p)  # (1 - alpha_i) / P_{i+1}
        acc = np.cumsum(air_c[:, start:stop] * gain, axis=1)
        out[:, start + 1 : stop + 1] = np.exp(-log_p) * (out[:, start : start + 1] + acc)
        start = stop
    return out

"""Published radio physics used by the demo world: path loss, shadowing, fading, capacity, A3 handover."""

from __future__ import annotations

from typing import Any

import numpy as np
from scipy.signal import lfilter

C_M_S = 299_792_458.0
RADIO_STEP_S = 0.04  # 40 ms: fine enough for 3GPP time-to-trigger values (40, 80, ..., 640 ms)
SUB = 25             # radio steps per 1 s output sample
NTP_UNIX_OFFSET_S = 2208988800  # RFC 868: 1900-01-01 to 1970-01-01


# --- published physics, small and testable -------------------------------------------------------
def _ar1(rng: np.random.Generator, n: int, cols: int, tau_steps: float, sigma: float) -> np.ndarray:
    """Stationary Gaussian AR(1) columns with correlation exp(-lag / tau_steps), run by lfilter."""
    rho = np.exp(-1.0 / tau_steps)
    w = rng.standard_normal((n, cols)) * sigma * np.sqrt(1 - rho**2)
    w[0] /= np.sqrt(1 - rho**2)  # start in the stationary distribution
    return lfilter([1.0], [1.0, -rho], w, axis=0)


def free_space_path_loss_db(d_m: Any, freq_hz: float) -> np.ndarray:
    """Free-space path loss 20 log10(4 pi d f / c) (Friis 1946)."""
    return 20.0 * np.log10(4.0 * np.pi * np.asarray(d_m, dtype=float) * freq_hz / C_M_S)


def log_distance_path_loss_db(d_m: Any, exponent: float, freq_hz: float, d0_m: float = 1.0) -> np.ndarray:
    """Log-distance path loss PL(d) = PL_fs(d0) + 10 n log10(d / d0), for d >= d0."""
    d = np.maximum(np.asarray(d_m, dtype=float), d0_m)
    return free_space_path_loss_db(d0_m, freq_hz) + 10.0 * exponent * np.log10(d / d0_m)


def gudmundson_shadowing_db(arc_m: np.ndarray, n_links: int, sigma_db: float, decorrelation_m: float,
                            rng: np.random.Generator, step_m: float = 1.0) -> np.ndarray:
    """Log-normal shadowing (n, n_links) along travelled distance with correlation exp(-|dx| / d_corr).

    Gudmundson (1991): an AR(1) on a regular distance grid, interpolated at each sample's distance, so a
    parked device keeps its shadowing and a moving one decorrelates with metres, not seconds.
    """
    grid = int(np.ceil(float(np.max(arc_m, initial=0.0)) / step_m)) + 2
    x = _ar1(rng, grid, n_links, decorrelation_m / step_m, sigma_db)
    pos = np.asarray(arc_m) / step_m
    i = np.minimum(pos.astype(np.int64), grid - 2)
    return x[i] + (x[i + 1] - x[i]) * (pos - i)[:, None]


def fading_power_mean(rng: np.random.Generator, k_factor: np.ndarray, n_avg: np.ndarray) -> np.ndarray:
    """Mean of ``n_avg`` independent Rician power samples (K = 0: Rayleigh), unit mean.

    2(K+1)|h|^2 is noncentral chi-square with 2 degrees of freedom and noncentrality 2K; the sum of M of
    them has 2M degrees of freedom and noncentrality 2MK.
    """
    m, k = np.asarray(n_avg, dtype=float), np.asarray(k_factor, dtype=float)
    return rng.noncentral_chisquare(2.0 * m, 2.0 * m * k) / (2.0 * m * (k + 1.0))


def shannon_capacity_bps(bandwidth_hz: Any, sinr: Any, efficiency: float = 1.0,
                         max_se: float = np.inf) -> np.ndarray:
    """B * min(efficiency * log2(1 + SINR), max_se): Shannon (1948) with an efficiency factor and a cap."""
    se = np.minimum(efficiency * np.log2(1.0 + np.asarray(sinr, dtype=float)), max_se)
    return np.asarray(bandwidth_hz, dtype=float) * se


def a3_next(rsrp_db: np.ndarray, start: int, serving: int, hysteresis_db: float,
            ttt_steps: int) -> tuple[int, int] | None:
    """The next A3-style handover (3GPP TS 36.331 event A3 entering condition, offsets folded into one margin).

    A neighbour triggers once Mn > Ms + hysteresis has held for ``ttt_steps`` consecutive steps; the
    handover executes at the step after (onset + TTT). Returns (step, target) or None.
    """
    margin = rsrp_db[start:] - rsrp_db[start:, serving:serving + 1]
    cond = margin > hysteresis_db
    cond[:, serving] = False
    idx = np.arange(len(cond))[:, None]
    run = idx - np.maximum.accumulate(np.where(cond, -1, idx), axis=0)  # consecutive-true run lengths
    hit = np.flatnonzero((run >= ttt_steps).any(axis=1))
    if not hit.size or start + hit[0] + 1 >= len(rsrp_db):
        return None
    row = hit[0]  # several neighbours ready at once: the strongest wins
    return start + row + 1, int(np.argmax(np.where(run[row] >= ttt_steps, rsrp_db[start + row], -np.inf)))

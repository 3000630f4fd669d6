"""Interarrival jitter: the RFC 3550 appendix A.8 estimator, shared by the readers.

For packets i-1 and i with transit times (arrival minus sender timestamp) S and R,
D = R_i - R_{i-1} - (S_i - S_{i-1}) = transit_i - transit_{i-1}, and the estimate is updated as
J += (|D| - J) / 16, starting from 0. The unit of the output is the unit of the input.
"""

from __future__ import annotations

import numpy as np
from scipy.signal import lfilter

from .errors import InputError

# J_i = J_{i-1} + (|D_i| - J_{i-1})/16 = (15/16) J_{i-1} + |D_i|/16: a first-order IIR filter on |D|.
_B = np.array([1.0 / 16.0])
_A = np.array([1.0, -15.0 / 16.0])


def interarrival_jitter(transit: np.ndarray) -> np.ndarray:
    """RFC 3550 A.8 jitter after each packet, in the unit of ``transit``.

    J is 0 at the first known transit. NaN transits (missing packets) are skipped: D is taken between
    consecutive known transits, and the output is NaN where the input is NaN.
    """
    x = np.asarray(transit, dtype=np.float64)
    if x.ndim != 1:
        raise InputError(f"transit times must be a 1-D series, not {x.ndim}-D", field="transit")
    if np.isinf(x).any():
        raise InputError("transit time is infinite", field="transit",
                         hint="use NaN for a missing packet")
    out = np.full(x.shape, np.nan)
    known = np.flatnonzero(~np.isnan(x))
    if known.size == 0:
        return out
    jit = np.zeros(known.size)
    if known.size > 1:
        jit[1:] = lfilter(_B, _A, np.abs(np.diff(x[known])))
    out[known] = jit
    return out

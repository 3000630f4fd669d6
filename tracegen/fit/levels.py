"""Hidden levels of log-bandwidth (optionally joint with log-RTT): Gaussian HMM fitted by Baum–Welch.

hmmlearn runs the EM over all level runs as separate sequences. Its own initialisation can put every state
on one mean, so each restart starts from our own guess instead: restart 0 from evenly spaced quantiles of
log-bandwidth, later restarts from k-means++ seeds drawn with the restart's own seed; the best final
log-likelihood wins. States are then ordered from low to high mean log-bandwidth.
"""

from __future__ import annotations

import logging
import warnings
from dataclasses import dataclass

import numpy as np
from hmmlearn.hmm import GaussianHMM
from scipy.cluster.vq import kmeans2

from ..errors import TracegenError
from .prepare import LEVEL, OUTAGE, UNKNOWN, Prepared, runs

MIN_VAR = 1e-4  # floor on log-space variances: below ~1 % spread a level is numerically a constant
MIN_SAMPLES_PER_PARAMETER = 5


@dataclass(frozen=True)
class HmmFit:
    """One fitted HMM with states ordered low to high (arrays are copies, the hmmlearn object is kept
    only for decoding)."""

    n_states: int
    means: np.ndarray        # (K, d)
    covars: np.ndarray       # (K, d, d)
    transmat: np.ndarray     # (K, K), with self-transitions (HMM view)
    startprob: np.ndarray
    loglik: float
    bic: float
    n_iter: int
    converged: bool
    restart_logliks: tuple[float, ...]
    model: GaussianHMM

    def decode(self, prepared: Prepared) -> np.ndarray:
        """Viterbi states of all level samples (stack order)."""
        _, states = self.model.decode(prepared.features, list(prepared.lengths), algorithm="viterbi")
        return states


def _initial_means(x: np.ndarray, k: int, restart: int, seed: int) -> np.ndarray:
    if restart == 0:
        q = (np.arange(k) + 0.5) / k
        return np.quantile(x, q, axis=0).reshape(k, -1)
    rng = np.random.default_rng([seed, restart])
    sample = x[rng.choice(len(x), size=min(len(x), 20_000), replace=False)]
    centroids, _ = kmeans2(sample, k, minit="++", seed=rng, iter=20)
    return centroids[np.argsort(centroids[:, 0])]


def _one_restart(x: np.ndarray, lengths: list[int], k: int, restart: int, seed: int, max_iter: int,
                 tol: float) -> GaussianHMM:
    d = x.shape[1]
    means = _initial_means(x, k, restart, seed)
    nearest = np.argmin(((x[:, None, :] - means[None]) ** 2).sum(-1), axis=1)
    covars = np.empty((k, d, d))
    overall = np.atleast_2d(np.cov(x.T)) if len(x) > 1 else np.eye(d)
    for j in range(k):  # a loop over states, not samples
        members = x[nearest == j]
        c = np.atleast_2d(np.cov(members.T)) if len(members) > d + 1 else overall / k**2
        covars[j] = c + np.eye(d) * MIN_VAR
    # one feature: "diag" is the same model and avoids hmmlearn's per-sequence triangular solves
    kind = "diag" if d == 1 else "full"
    model = GaussianHMM(n_components=k, covariance_type=kind, min_covar=MIN_VAR, n_iter=max_iter, tol=tol,
                        init_params="", params="stmc", random_state=int(seed) + restart, implementation="log")
    model.startprob_ = np.full(k, 1.0 / k)
    stay = 0.95 if k > 1 else 1.0
    model.transmat_ = np.full((k, k), (1 - stay) / max(k - 1, 1)) + np.eye(k) * (stay - (1 - stay) / max(k - 1, 1))
    model.means_ = means
    model.covars_ = covars if kind == "full" else covars[:, :, 0]
    logger = logging.getLogger("hmmlearn")
    level = logger.level
    logger.setLevel(logging.ERROR)  # hmmlearn logs non-convergence itself; we record it on the result
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            model.fit(x, lengths)
    finally:
        logger.setLevel(level)
    return model


def _ordered(model: GaussianHMM) -> GaussianHMM:
    order = np.argsort(model.means_[:, 0], kind="stable")
    if np.array_equal(order, np.arange(len(order))):
        return model
    covars = model._covars_[order]  # stored form: (K, d) for diag, (K, d, d) for full
    model.startprob_ = model.startprob_[order]
    model.transmat_ = model.transmat_[np.ix_(order, order)]
    model.means_ = model.means_[order]
    model.covars_ = covars
    return model


def fit_hmm(prepared: Prepared, n_states: int, *, restarts: int = 3, seed: int = 0, max_iter: int = 100,
            tol: float = 1e-3) -> HmmFit:
    """Best of ``restarts`` Baum–Welch fits with ``n_states`` states, ordered low to high."""
    x = prepared.features
    lengths = list(prepared.lengths)
    d = x.shape[1]
    k = int(n_states)
    n_params = k * d + k * d * (d + 1) // 2 + k * (k - 1) + (k - 1)
    need = MIN_SAMPLES_PER_PARAMETER * n_params
    if len(x) < need:
        raise TracegenError(f"{k} states need at least {need} level samples ({MIN_SAMPLES_PER_PARAMETER} per "
                            f"parameter), the selection has {len(x)}", field="states",
                            hint="select more or longer traces, or ask for fewer states")
    if np.ptp(x[:, 0]) < 1e-9:
        raise TracegenError("bandwidth is constant over the whole selection: there are no levels to learn",
                            field="selection", hint="select traces whose bandwidth varies")
    best, logliks = None, []
    for r in range(max(1, restarts)):
        model = _one_restart(x, lengths, k, r, seed, max_iter, tol)
        ll = float(model.score(x, lengths))
        logliks.append(ll)
        if np.isfinite(ll) and (best is None or ll > best[0]):
            best = (ll, model)
    if best is None:
        raise TracegenError(f"every one of {restarts} restarts with {k} states failed numerically", field="states",
                            hint="ask for fewer states or check the traces for extreme values")
    ll, model = best
    model = _ordered(model)
    bic = -2.0 * ll + n_params * np.log(len(x))
    return HmmFit(k, model.means_.copy(), np.asarray(model.covars_).copy(), model.transmat_.copy(),
                  model.startprob_.copy(), ll, float(bic), int(model.monitor_.iter),
                  bool(model.monitor_.converged), tuple(logliks), model)


def state_paths(prepared: Prepared, level_states: np.ndarray, with_outage: bool) -> list[np.ndarray]:
    """Per trace, the model state of every sample: outage 0 (when the model has one), levels after it,
    -1 unknown."""
    shift = 1 if with_outage else 0
    out = []
    pos = 0
    for kind, index in zip(prepared.kinds, prepared.run_index):
        s = np.full(kind.size, UNKNOWN, dtype=np.int64)
        if with_outage:
            s[kind == OUTAGE] = 0
        for a, b in index:
            s[a:b] = level_states[pos:pos + (b - a)] + shift
            pos += b - a
        out.append(s)
    return out


@dataclass(frozen=True)
class Segments:
    """Dwell segments of all traces: state, length in steps, whether the segment's start (``left_cut``) or
    end (``right_cut``) is hidden by a trace edge or a gap, and the transitions between segments."""

    state: np.ndarray
    length: np.ndarray
    left_cut: np.ndarray
    right_cut: np.ndarray
    trace: np.ndarray
    start: np.ndarray
    transitions: np.ndarray  # (m, 2) pairs (from, to), never across an unknown gap


def segments(paths: list[np.ndarray]) -> Segments:
    """Split state paths into runs, marking runs whose start or end is hidden by an edge or a gap."""
    st, ln, lc, rc, tr, sa, trans = [], [], [], [], [], [], []
    for i, path in enumerate(paths):
        s, e, v = runs(path)
        known = v != UNKNOWN
        left = np.ones(len(v), bool)
        left[1:] = v[:-1] == UNKNOWN
        right = np.ones(len(v), bool)
        right[:-1] = v[1:] == UNKNOWN
        st.append(v[known])
        ln.append((e - s)[known])
        lc.append(left[known])
        rc.append(right[known])
        tr.append(np.full(int(known.sum()), i))
        sa.append(s[known])
        pair = known[:-1] & known[1:]
        trans.append(np.column_stack((v[:-1][pair], v[1:][pair])))
    cat = (lambda parts, dtype: np.concatenate(parts).astype(dtype) if parts else np.zeros(0, dtype))
    return Segments(cat(st, np.int64), cat(ln, np.int64), cat(lc, bool), cat(rc, bool), cat(tr, np.int64),
                    cat(sa, np.int64),
                    np.concatenate(trans).astype(np.int64) if trans else np.zeros((0, 2), np.int64))


def jump_matrix(seg: Segments, n_states: int) -> np.ndarray:
    """Transition probabilities between different states (zero diagonal), from counted segment changes.

    A state never seen leaving gets uniform jumps to the others (with a single state: none).
    """
    counts = np.zeros((n_states, n_states))
    if len(seg.transitions):
        np.add.at(counts, (seg.transitions[:, 0], seg.transitions[:, 1]), 1.0)
    np.fill_diagonal(counts, 0.0)
    rows = counts.sum(1, keepdims=True)
    uniform = (np.ones((n_states, n_states)) - np.eye(n_states)) / max(n_states - 1, 1)
    with np.errstate(invalid="ignore", divide="ignore"):
        p = np.where(rows > 0, counts / rows, uniform)
    if n_states == 1:
        p[:] = 0.0
    return p


__all__ = ["HmmFit", "Segments", "fit_hmm", "jump_matrix", "segments", "state_paths", "LEVEL"]

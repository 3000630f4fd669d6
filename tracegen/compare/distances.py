"""Distances between two sets of feature vectors: a "real" set and a synthetic (or training) set.

Rows are time windows, columns are features (mean log bandwidth, RTT percentiles, outage share, ...);
NaN marks an unknown value. Both sets must have the same columns in the same order; a 1-D array is
read as one feature column.

* Per feature: the two-sample Kolmogorov–Smirnov statistic and the Wasserstein-1 distance, each column
  on its own known values, in one sort over all columns (equal to ``scipy.stats.ks_2samp`` and
  ``scipy.stats.wasserstein_distance`` on the same values).
* Multivariate, on complete rows (no NaN): the energy distance of Székely & Rizzo, the unbiased MMD^2 of
  Gretton et al. (2012) with a Gaussian kernel, a permutation p-value for either, and the k-NN
  precision/recall of Kynkäänniemi et al. (2019) with the density/coverage of Naeem et al. (2020).

The multivariate distances are Euclidean in the units they are given, so standardise first: take
``robust_scale`` of the real set and ``standardise`` both sets with it (otherwise a bandwidth in bit/s
outweighs every other feature).
"""

from __future__ import annotations

import functools
import itertools
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from scipy.spatial import cKDTree
from scipy.spatial.distance import cdist, pdist
from scipy.special import ndtri

from ..errors import TracegenError

# interquartile range of the standard normal, 2 * Phi^-1(3/4) = 1.3489795...: IQR / this estimates sd
_IQR_NORMAL = float(2.0 * ndtri(0.75))
# elements of one block of a pairwise matrix held at once (32 MB of float64)
_BLOCK_ELEMENTS = 4_000_000
# query points per kd-tree ball query (bounds the Python lists one query returns)
_BALL_CHUNK = 8192
# permutations evaluated per matrix product in the pooled permutation path
_PERM_CHUNK = 256


# --------------------------------------------------------------------------------------------------
# input checks


def _matrix(x, name: str) -> np.ndarray:
    """``x`` as a float (rows, features) array; a 1-D array is one feature. Finite or NaN only."""
    try:
        arr = np.asarray(x, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise TracegenError(f"argument '{name}' is not a numeric array ({exc})",
                            hint="pass a 2-D float array: rows are windows, columns are features") from None
    if arr.ndim == 1:
        arr = arr[:, None]
    if arr.ndim != 2:
        raise TracegenError(f"argument '{name}' is {arr.ndim}-D",
                            hint="pass a 2-D array: rows are windows, columns are features")
    if arr.shape[1] == 0:
        raise TracegenError(f"argument '{name}' has no feature columns", hint="pass at least one feature")
    if np.isinf(arr).any():
        raise TracegenError(f"argument '{name}' holds an infinite value",
                            hint="features must be finite; use NaN for an unknown value")
    return arr


def _pair(a, b, names: tuple[str, str] = ("a", "b")) -> tuple[np.ndarray, np.ndarray]:
    """Two sets with the same columns and at least one row each."""
    x, y = _matrix(a, names[0]), _matrix(b, names[1])
    if x.shape[1] != y.shape[1]:
        raise TracegenError(
            f"argument '{names[1]}' has {y.shape[1]} feature columns but '{names[0]}' has {x.shape[1]}",
            hint="compute the same features in the same order for both sets")
    for name, arr in zip(names, (x, y)):
        if arr.shape[0] == 0:
            raise TracegenError(f"argument '{name}' is an empty set (no rows)",
                                hint="pass at least one window on each side")
    return x, y


def _generator(rng, name: str = "rng") -> np.random.Generator:
    if not isinstance(rng, np.random.Generator):
        raise TracegenError(f"argument '{name}' must be a numpy Generator, not {type(rng).__name__}",
                            hint="pass np.random.default_rng(seed)")
    return rng


def _int_at_least(value, name: str, minimum: int) -> int:
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, np.integer)) or value < minimum:
        raise TracegenError(f"argument '{name}' must be an integer >= {minimum}, not {value!r}",
                            hint=f"pass {name}={minimum} or more")
    return int(value)


def _complete(x: np.ndarray, name: str, need: int, why: str) -> np.ndarray:
    rows = x[complete_rows(x)]
    if rows.shape[0] < need:
        raise TracegenError(
            f"argument '{name}' has {rows.shape[0]} complete rows (rows without NaN); {why} needs at least "
            f"{need}", hint="pass more windows, or drop the features that are mostly unknown")
    return rows


def _draw(n: int, max_points: int | None, rng) -> np.ndarray:
    """Positions of ``max_points`` of ``n`` rows drawn without replacement when there are more (all rows
    otherwise), in their original order."""
    if max_points is None or n <= max_points:
        return np.arange(n)
    return np.sort(rng.choice(n, size=max_points, replace=False))


def _subsample(x: np.ndarray, max_points: int | None, rng) -> np.ndarray:
    return x[_draw(x.shape[0], max_points, rng)]


# --------------------------------------------------------------------------------------------------
# scaling


def robust_scale(real: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per-column ``(center, scale)`` of the real set, ignoring NaN.

    center is the median; scale is the interquartile range divided by 2*Phi^-1(3/4) = 1.34898 (the sd
    of a normal law), falling back to the sample sd (ddof=1) where the IQR is 0, and to 1 where that
    is 0 or undefined too. A column with no known value gets center NaN and scale 1, so it stays
    unknown after ``standardise``.
    """
    x = _matrix(real, "real")
    if x.shape[0] == 0:
        raise TracegenError("argument 'real' is an empty set (no rows)",
                            hint="the scale comes from the real windows: pass at least one")
    f = x.shape[1]
    known = ~np.isnan(x)
    count = known.sum(axis=0)
    center = np.full(f, np.nan)
    scale = np.ones(f)
    has = count > 0
    if has.any():
        xh, nh = x[:, has], count[has]
        center[has] = np.nanmedian(xh, axis=0)
        q25, q75 = np.nanpercentile(xh, [25.0, 75.0], axis=0)
        iqr = (q75 - q25) / _IQR_NORMAL
        mean = np.nansum(xh, axis=0) / nh
        ss = np.nansum((xh - mean) ** 2, axis=0)
        sd = np.sqrt(ss / np.maximum(nh - 1, 1))
        sd[nh < 2] = 0.0
        scale[has] = np.where(iqr > 0, iqr, np.where(sd > 0, sd, 1.0))
    return center, scale


def standardise(x: np.ndarray, center: np.ndarray, scale: np.ndarray) -> np.ndarray:
    """``(x - center) / scale`` per column (NaN stays NaN); center and scale from ``robust_scale``."""
    arr = _matrix(x, "x")
    f = arr.shape[1]
    c = np.asarray(center, dtype=np.float64)
    s = np.asarray(scale, dtype=np.float64)
    for name, v in (("center", c), ("scale", s)):
        if v.shape != (f,):
            raise TracegenError(f"argument '{name}' has shape {v.shape} but 'x' has {f} feature columns",
                                hint="take center and scale from robust_scale of a set with the same columns")
    if not (np.isfinite(s).all() and (s > 0).all()):
        raise TracegenError("argument 'scale' holds a value that is not a positive finite number",
                            hint="take scale from robust_scale")
    return (arr - c) / s


def complete_rows(x: np.ndarray, columns: np.ndarray | None = None) -> np.ndarray:
    """Boolean mask of the rows of ``x`` with no NaN in ``columns`` (indices or a boolean mask; all
    columns when None)."""
    arr = _matrix(x, "x")
    if columns is None:
        return ~np.isnan(arr).any(axis=1)
    cols = np.asarray(columns)
    if cols.dtype == bool:
        if cols.shape != (arr.shape[1],):
            raise TracegenError(f"argument 'columns' is a mask of shape {cols.shape} but 'x' has "
                                f"{arr.shape[1]} columns", hint="pass one flag per column, or column indices")
    elif cols.size and (not np.issubdtype(cols.dtype, np.integer) or cols.min() < -arr.shape[1]
                        or cols.max() >= arr.shape[1]):
        raise TracegenError(f"argument 'columns' must index the {arr.shape[1]} columns of 'x'",
                            hint="pass integer column indices or a boolean mask")
    return ~np.isnan(arr[:, cols.astype(bool) if cols.dtype == bool else cols.astype(np.intp)]).any(axis=1)


# --------------------------------------------------------------------------------------------------
# per feature


def _pooled_cdfs(a, b):
    """Per column, both empirical CDFs at each value of the pooled sorted sample (NaN sorted last).

    Returns, each (f, n_a + n_b) with one row per feature column so that reductions run over contiguous
    memory: cdf_a, cdf_b, whether the position ends a run of equal known values, the step to the next
    value (0 where either is unknown); then the known counts per column on each side.
    """
    x, y = _pair(a, b)
    na = x.shape[0]
    pooled = np.ascontiguousarray(np.concatenate([x, y], axis=0).T)  # (f, n)
    order = np.argsort(pooled, axis=1, kind="stable")  # NaN sort last
    vals = np.take_along_axis(pooled, order, axis=1)
    from_a = order < na
    # NaN positions come after every known value, so counting all labels up to a known position counts
    # known values only
    ca = np.cumsum(from_a, axis=1)
    cb = np.cumsum(~from_a, axis=1)
    ma = (~np.isnan(x)).sum(axis=0)
    mb = (~np.isnan(y)).sum(axis=0)
    with np.errstate(divide="ignore", invalid="ignore"):
        cdf_a = ca / ma[:, None]
        cdf_b = cb / mb[:, None]
    known = ~np.isnan(vals)
    nxt = np.empty_like(vals)
    nxt[:, :-1] = vals[:, 1:]
    nxt[:, -1] = np.nan
    run_end = known & (nxt != vals)  # NaN != v, so the last known value ends its run
    step = np.where(known & ~np.isnan(nxt), nxt - vals, 0.0)
    return cdf_a, cdf_b, run_end, step, ma, mb


def ks_per_feature(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Two-sample Kolmogorov–Smirnov statistic sup|F_a - F_b| per column, shape (f,).

    NaN values are dropped per column; a column with no known value on a side gives NaN. Equal (to
    rounding) to ``scipy.stats.ks_2samp(a_col, b_col).statistic`` on the known values: the CDFs are
    compared at the end of each run of tied values, as scipy's searchsorted(..., side='right') does.
    """
    cdf_a, cdf_b, run_end, _, ma, mb = _pooled_cdfs(a, b)
    with np.errstate(invalid="ignore"):
        diff = np.where(run_end, np.abs(cdf_a - cdf_b), 0.0)
    out = diff.max(axis=1)
    out[(ma == 0) | (mb == 0)] = np.nan
    return out


def wasserstein_per_feature(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Wasserstein-1 distance integral |F_a - F_b| per column, shape (f,), in the column's unit.

    Same NaN rule as ``ks_per_feature``. Equal to ``scipy.stats.wasserstein_distance`` on the known
    values up to summation order (inside a run of ties the step to the next value is 0, so the CDF there
    does not matter).
    """
    cdf_a, cdf_b, _, step, ma, mb = _pooled_cdfs(a, b)
    with np.errstate(invalid="ignore"):
        terms = np.where(step > 0, np.abs(cdf_a - cdf_b) * step, 0.0)
    out = terms.sum(axis=1)
    out[(ma == 0) | (mb == 0)] = np.nan
    return out


# --------------------------------------------------------------------------------------------------
# energy distance and MMD: sums of a pairwise matrix over the blocks a-a, a-b, b-b


def _block_sums(pooled: np.ndarray, labels: np.ndarray, kernel: Callable[[np.ndarray, np.ndarray], np.ndarray]
                ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """For each column z of ``labels`` (1 = side a, 0 = side b): z'Kz, z'K(1-z), (1-z)'K(1-z) of the
    symmetric matrix K[i, j] = kernel(rows i, rows j) of the pooled points, without holding K whole.

    Each row block is computed once against itself and the rows after it; the part beyond the block
    also serves the transposed (lower) half.
    """
    n = pooled.shape[0]
    both = np.concatenate([labels, 1.0 - labels], axis=1)  # (n, 2p)
    kz = np.zeros_like(both)
    rows = max(1, min(n, _BLOCK_ELEMENTS // max(n, 1)))
    for i0 in range(0, n, rows):  # blocks of rows, not points
        i1 = min(n, i0 + rows)
        blk = kernel(pooled[i0:i1], pooled[i0:])  # (i1-i0, n-i0): the diagonal block, then the rest
        kz[i0:i1] += blk @ both[i0:]
        if i1 < n:
            kz[i1:] += blk[:, i1 - i0:].T @ both[i0:i1]
    p = labels.shape[1]
    za, zb = both[:, :p], both[:, p:]
    s_aa = np.einsum("ij,ij->j", za, kz[:, :p])
    s_ab = np.einsum("ij,ij->j", za, kz[:, p:])
    s_bb = np.einsum("ij,ij->j", zb, kz[:, p:])
    return s_aa, s_ab, s_bb


def _euclidean(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    return cdist(x, y, "euclidean")


def _gaussian(bandwidth: float) -> Callable[[np.ndarray, np.ndarray], np.ndarray]:
    factor = -0.5 / (bandwidth * bandwidth)

    def kernel(x: np.ndarray, y: np.ndarray) -> np.ndarray:
        k = cdist(x, y, "sqeuclidean")
        k *= factor
        np.exp(k, out=k)
        m = x.shape[0]
        k[np.arange(m), np.arange(m)] = 0.0  # x is the head of y: its diagonal is i == j (left out)
        return k

    return kernel


def _energy_from_sums(s_aa, s_ab, s_bb, m: int, n: int):
    return 2.0 * s_ab / (m * n) - s_aa / (m * m) - s_bb / (n * n)


def _mmd_from_sums(s_aa, s_ab, s_bb, m: int, n: int):
    return s_aa / (m * (m - 1)) + s_bb / (n * (n - 1)) - 2.0 * s_ab / (m * n)


def _energy_setup(a, b, max_points, rng):
    x, y = _pair(a, b)
    max_points = _int_at_least(max_points, "max_points", 1)
    rng = _generator(rng)
    x = _complete(x, "a", 1, "the energy distance")
    y = _complete(y, "b", 1, "the energy distance")
    x = _subsample(x, max_points, rng)
    y = _subsample(y, max_points, rng)
    return x, y, _euclidean, _energy_from_sums


def _median_bandwidth(pooled: np.ndarray) -> float:
    d = pdist(pooled, "euclidean")
    h = float(np.median(d))
    if h > 0:
        return h
    pos = d[d > 0]
    return float(np.median(pos)) if pos.size else 1.0


def _mmd_setup(a, b, bandwidth, max_points, rng):
    x, y = _pair(a, b)
    max_points = _int_at_least(max_points, "max_points", 2)
    rng = _generator(rng)
    if bandwidth is not None and not (isinstance(bandwidth, (int, float, np.floating, np.integer))
                                      and np.isfinite(bandwidth) and bandwidth > 0):
        raise TracegenError(f"argument 'bandwidth' must be a positive number, not {bandwidth!r}",
                            hint="pass None for the median heuristic")
    x = _complete(x, "a", 2, "the unbiased MMD")
    y = _complete(y, "b", 2, "the unbiased MMD")
    x = _subsample(x, max_points, rng)
    y = _subsample(y, max_points, rng)
    h = float(bandwidth) if bandwidth is not None else _median_bandwidth(np.concatenate([x, y]))
    return x, y, _gaussian(h), _mmd_from_sums


def _two_sample(x, y, kernel, combine) -> float:
    m, n = x.shape[0], y.shape[0]
    labels = np.zeros((m + n, 1))
    labels[:m] = 1.0
    sums = _block_sums(np.concatenate([x, y]), labels, kernel)
    return float(combine(*sums, m, n)[0])


def energy_distance(a: np.ndarray, b: np.ndarray, *, max_points: int = 2000,
                    rng: np.random.Generator) -> float:
    """Energy distance of Székely & Rizzo, 2E|X-Y| - E|X-X'| - E|Y-Y'| (Euclidean norm), between the
    empirical laws of the complete rows of ``a`` and ``b``.

    The expectations are plain means over all pairs, i == j included (V-statistics), so identical
    samples give 0 and the value is >= 0. Each side with more than ``max_points`` complete rows is first
    subsampled to ``max_points`` rows without replacement, drawn from ``rng``; the cost is
    O((m+n)^2 * features).

    Relation to scipy: ``scipy.stats.energy_distance(u, v)`` (1-D only) returns the square root of this
    same quantity, (2E|X-Y| - E|X-X'| - E|Y-Y'|)^(1/2) = (2 * integral (U-V)^2)^(1/2); so in 1-D
    ``energy_distance(u, v, ...) == scipy.stats.energy_distance(u, v) ** 2``.
    """
    x, y, kernel, combine = _energy_setup(a, b, max_points, rng)
    return max(0.0, _two_sample(x, y, kernel, combine))


def mmd_rbf(a: np.ndarray, b: np.ndarray, *, bandwidth: float | None = None, max_points: int = 2000,
            rng: np.random.Generator) -> float:
    """Unbiased squared maximum mean discrepancy MMD_u^2 of Gretton et al. (2012, eq. 3) with the
    Gaussian kernel k(x, y) = exp(-|x - y|^2 / (2 bandwidth^2)), on the complete rows of ``a`` and ``b``.

    MMD_u^2 = sum_{i!=j} k(x_i,x_j)/(m(m-1)) + sum_{i!=j} k(y_i,y_j)/(n(n-1)) - 2 sum_{i,j} k(x_i,y_j)/(mn);
    it is unbiased, so it scatters around 0 (negative values included) when both sets share one law.
    ``bandwidth`` None takes the median of the pairwise Euclidean distances of the pooled (subsampled)
    sample, as Gretton et al. do (the median of the positive ones if that is 0; 1 if all points coincide).
    Sides larger than ``max_points`` complete rows are subsampled without replacement from ``rng``.
    """
    x, y, kernel, combine = _mmd_setup(a, b, bandwidth, max_points, rng)
    return _two_sample(x, y, kernel, combine)


def _pooled_form(statistic):
    """(setup, keywords) when ``statistic`` is energy_distance or mmd_rbf, bare or as a functools.partial
    with keyword arguments only; else None."""
    func, kw = statistic, {}
    if isinstance(statistic, functools.partial):
        if statistic.args:
            return None
        func, kw = statistic.func, dict(statistic.keywords)
    if func is energy_distance:
        if set(kw) - {"max_points", "rng"}:
            return None
        return (lambda a, b: _energy_setup(a, b, kw.get("max_points", 2000), kw.get("rng"))), kw
    if func is mmd_rbf:
        if set(kw) - {"max_points", "rng", "bandwidth"}:
            return None
        return (lambda a, b: _mmd_setup(a, b, kw.get("bandwidth"), kw.get("max_points", 2000),
                                        kw.get("rng"))), kw
    return None


def permutation_pvalue(a: np.ndarray, b: np.ndarray, statistic: Callable[[np.ndarray, np.ndarray], float], *,
                       n_permutations: int = 200, rng: np.random.Generator) -> float:
    """Permutation p-value of ``statistic`` (larger = farther apart) for "a and b come from one law":
    (1 + #{permuted statistic >= observed}) / (1 + n_permutations).

    Each permutation shuffles the pooled rows with ``rng.permutation`` and splits them into sets of the
    original sizes. Any callable works: the rows of ``a`` and ``b`` (all of them, NaN included) are pooled
    and ``statistic`` is called once per permutation.

    Faster path: when ``statistic`` is ``energy_distance`` or ``mmd_rbf`` itself, or a
    ``functools.partial`` of either with keyword arguments only (it needs ``rng=``), the complete rows are
    subsampled once as the statistic would do it (``max_points`` per side, from the statistic's rng), the
    pairwise matrix of that pooled sample is computed once, and every permutation relabels it (one matrix
    product per 256 permutations); MMD's median bandwidth does not depend on the labels, so it is taken once.
    When no subsampling happens and every row is complete this gives the generic path's permutations and
    values (up to rounding); otherwise it permutes within the subsample, the usual way to test large sets.
    """
    x, y = _pair(a, b)
    n_permutations = _int_at_least(n_permutations, "n_permutations", 1)
    rng = _generator(rng)
    if not callable(statistic):
        raise TracegenError("argument 'statistic' is not callable", hint="pass a function of two arrays, "
                            "e.g. functools.partial(energy_distance, rng=rng)")
    form = _pooled_form(statistic)
    if form is not None:
        setup, _ = form
        xs, ys, kernel, combine = setup(x, y)
        m, n = xs.shape[0], ys.shape[0]
        pooled = np.concatenate([xs, ys])
        observed = None
        exceed = 0
        todo = n_permutations + 1  # column 0 is the observed labelling
        done = 0
        while done < todo:
            p = min(_PERM_CHUNK, todo - done)
            labels = np.zeros((m + n, p))
            for c in range(p):  # one column per permutation, not per point
                if done + c == 0:
                    labels[:m, 0] = 1.0
                else:
                    labels[rng.permutation(m + n)[:m], c] = 1.0
            values = combine(*_block_sums(pooled, labels, kernel), m, n)
            if done == 0:
                observed, values = values[0], values[1:]
            exceed += int(np.count_nonzero(values >= observed))
            done += p
        return (1.0 + exceed) / (1.0 + n_permutations)

    observed = float(statistic(x, y))
    if not np.isfinite(observed):
        raise TracegenError(f"argument 'statistic' returned {observed} on the given sets",
                            hint="pass a statistic that is finite on these sets")
    pooled = np.concatenate([x, y])
    m = x.shape[0]
    exceed = 0
    for _ in range(n_permutations):  # one statistic per permutation
        perm = rng.permutation(pooled.shape[0])
        exceed += float(statistic(pooled[perm[:m]], pooled[perm[m:]])) >= observed
    return (1.0 + exceed) / (1.0 + n_permutations)


# --------------------------------------------------------------------------------------------------
# precision / recall / density / coverage


@dataclass(frozen=True, eq=False)
class PRDC:
    """k-NN precision and recall (Kynkäänniemi et al. 2019), density and coverage (Naeem et al. 2020).

    Per-point arrays index the rows used: the complete rows of ``real`` / ``fake`` in order (after
    subsampling when ``max_points`` applied); ``real_rows`` / ``fake_rows`` give their row numbers in the
    arrays passed in. Radii are in the units of the features passed in.
    """

    precision: float
    recall: float
    density: float
    coverage: float
    k: int
    real_covered: np.ndarray  # (n_real,) some synthetic point lies in this real point's k-NN ball
    fake_inside: np.ndarray  # (n_fake,) inside some real k-NN ball
    real_radius: np.ndarray  # (n_real,) distance to the k-th nearest other real point
    real_rows: np.ndarray | None = None  # (n_real,) row numbers in the 'real' argument
    fake_rows: np.ndarray | None = None  # (n_fake,) row numbers in the 'fake' argument


def _dist(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Euclidean norm of x - y over the last axis, summing squares feature by feature in column order.

    Every distance prdc compares goes through here, so a point that coincides with another compares
    equal to it bit for bit (k-NN radii and ball membership use the same arithmetic).
    """
    diff = x - y
    acc = diff[..., 0] * diff[..., 0]
    for c in range(1, diff.shape[-1]):  # over features
        acc += diff[..., c] * diff[..., c]
    return np.sqrt(acc)


def _knn_radius(points: np.ndarray, tree: cKDTree, k: int) -> np.ndarray:
    """Distance from each point to its k-th nearest other point of the same set."""
    order = tree.indices  # queries in tree order visit neighbouring leaves one after another
    _, idx = tree.query(points[order], k=k + 1, workers=-1)
    nbr = np.empty_like(idx)
    nbr[order] = idx
    # the k+1 nearest include the point itself (or a duplicate of it, at distance 0 as well); recompute
    # their distances with _dist and take the largest
    out = np.empty(points.shape[0])
    rows = max(1, _BLOCK_ELEMENTS // ((k + 1) * points.shape[1]))
    for i0 in range(0, points.shape[0], rows):  # blocks of rows
        i1 = min(points.shape[0], i0 + rows)
        out[i0:i1] = _dist(points[i0:i1, None, :], points[nbr[i0:i1]]).max(axis=1)
    return out


def _ball_hits(centres: np.ndarray, radii: np.ndarray, centre_order: np.ndarray, points: np.ndarray,
               tree: cKDTree) -> tuple[np.ndarray, np.ndarray]:
    """Per centre, how many points lie in its closed ball; per point, whether any ball holds it. Exact.

    The kd-tree gathers candidates within the radius widened by 1e-9 (its own rounding), then _dist
    decides. Cost grows with the number of (centre, point) pairs inside balls, about k * n_points * density.
    """
    count = np.zeros(centres.shape[0], dtype=np.int64)
    hit = np.zeros(points.shape[0], dtype=bool)
    widened = radii * (1.0 + 1e-9)
    for s in range(0, centres.shape[0], _BALL_CHUNK):  # chunks of queries bound the lists held at once
        sel = centre_order[s:s + _BALL_CHUNK]
        lists = tree.query_ball_point(centres[sel], r=widened[sel], workers=-1, return_sorted=False)
        lens = np.fromiter(map(len, lists), dtype=np.intp, count=len(lists))
        total = int(lens.sum())
        if total == 0:
            continue
        pj = np.fromiter(itertools.chain.from_iterable(lists), dtype=np.intp, count=total)
        ci = np.repeat(sel, lens)
        step = max(1, _BLOCK_ELEMENTS // centres.shape[1])
        for p0 in range(0, total, step):  # blocks of pairs
            c, p = ci[p0:p0 + step], pj[p0:p0 + step]
            inside = _dist(centres[c], points[p]) <= radii[c]
            count += np.bincount(c[inside], minlength=centres.shape[0])
            hit[p[inside]] = True
    return count, hit


def prdc(real: np.ndarray, fake: np.ndarray, *, k: int = 5, max_points: int | None = None,
         rng: np.random.Generator | None = None) -> PRDC:
    """Precision, recall (Kynkäänniemi et al. 2019), density and coverage (Naeem et al. 2020) with k-NN
    balls, on the complete rows of ``real`` and ``fake`` (pass standardised features: Euclidean distance
    in the units given).

    The k-NN radius of a point is the distance to the k-th nearest other point of its own set.
    precision = share of fake points inside some real ball; recall = share of real points inside some fake
    ball; density = (number of (real ball, fake point) containments) / (k * n_fake); coverage = share of real
    points whose ball holds some fake point. Balls are closed (distance <= radius).

    Exact, no approximation: k-NN radii come from scipy.spatial.cKDTree queries, and the ball contents from
    one kd-tree ball query per real (and per fake) point with that point's own radius, every candidate
    then checked with the same distance arithmetic as the radii. (A query for, say, the 64 nearest real
    points of each fake point is not exact: any real point with a larger radius than the 64th distance
    may also hold it, and measured field-like features have radii far beyond it; it was also slower.)
    The cost grows with n log n per query in low intrinsic dimension and towards n^2 when the features
    fill many dimensions evenly (kd-trees gain little there); ``max_points`` subsamples each side to that
    many complete rows, without replacement, from ``rng`` (then required).
    """
    x, y = _pair(real, fake, ("real", "fake"))
    k = _int_at_least(k, "k", 1)
    if max_points is not None:
        max_points = _int_at_least(max_points, "max_points", k + 1)
    real_rows = np.flatnonzero(complete_rows(x))
    fake_rows = np.flatnonzero(complete_rows(y))
    for name, rows in (("real", real_rows), ("fake", fake_rows)):
        if rows.size <= k:
            raise TracegenError(
                f"argument '{name}' has {rows.size} complete rows (rows without NaN); k={k} needs at least "
                f"{k + 1}", hint="lower k or pass more windows")
    if max_points is not None and max(real_rows.size, fake_rows.size) > max_points:
        if rng is None:
            raise TracegenError(f"max_points={max_points} subsamples, so argument 'rng' is needed",
                                hint="pass rng=np.random.default_rng(seed)")
        rng = _generator(rng)
    r_idx = real_rows[_draw(real_rows.size, max_points, rng)]
    f_idx = fake_rows[_draw(fake_rows.size, max_points, rng)]
    r, f = x[r_idx], y[f_idx]
    tree_r, tree_f = cKDTree(r), cKDTree(f)
    radius_r = _knn_radius(r, tree_r, k)
    radius_f = _knn_radius(f, tree_f, k)
    in_real_ball, fake_inside = _ball_hits(r, radius_r, tree_r.indices, f, tree_f)
    _, real_inside = _ball_hits(f, radius_f, tree_f.indices, r, tree_r)
    real_covered = in_real_ball > 0
    for arr in (real_covered, fake_inside, radius_r, r_idx, f_idx):
        arr.flags.writeable = False
    return PRDC(
        precision=float(fake_inside.mean()),
        recall=float(real_inside.mean()),
        density=float(in_real_ball.sum() / (k * f.shape[0])),
        coverage=float(real_covered.mean()),
        k=k,
        real_covered=real_covered,
        fake_inside=fake_inside,
        real_radius=radius_r,
        real_rows=r_idx,
        fake_rows=f_idx,
    )

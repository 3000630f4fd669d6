"""tracegen.compare.distances against outside references: scipy.stats, the definitions in the papers
(computed here the slow way, with full distance matrices) and the closed forms they state."""

import functools
import itertools

import numpy as np
import pytest
import scipy.stats as st
from scipy.spatial.distance import cdist, pdist

from tracegen.compare import distances as D
from tracegen.errors import TracegenError


def gen(seed=0):
    return np.random.default_rng(seed)


def with_nans_and_ties(rng, n, f, loc=0.0, sd=1.0, nan_share=0.1):
    """Rounded normal values (many ties) with NaN scattered in."""
    x = np.round(rng.normal(loc, sd, size=(n, f)), 1)
    x[rng.random(x.shape) < nan_share] = np.nan
    return x


# ------------------------------------------------------------------------------------------------
# scaling


def test_robust_scale_is_median_and_normal_iqr():
    rng = gen(1)
    x = rng.normal(3.0, 2.0, size=(501, 3))
    x[rng.random(x.shape) < 0.2] = np.nan
    center, scale = D.robust_scale(x)
    for j in range(3):
        col = x[:, j][~np.isnan(x[:, j])]
        assert center[j] == np.median(col)  # numpy median of the known values
        # scipy.stats.iqr(scale='normal') divides the IQR by 2*Phi^-1(0.75) = 1.349
        assert scale[j] == pytest.approx(st.iqr(col, scale="normal"), rel=1e-12)


def test_robust_scale_fallbacks():
    rng = gen(2)
    n = 400
    zero_inflated = np.where(np.arange(n) < 360, 0.0, rng.exponential(1.0, n))  # IQR 0, sd > 0
    constant = np.full(n, 7.0)  # IQR 0 and sd 0
    unknown = np.full(n, np.nan)
    x = np.column_stack([zero_inflated, constant, unknown])
    center, scale = D.robust_scale(x)
    assert scale[0] == pytest.approx(np.std(zero_inflated, ddof=1), rel=1e-12)  # sample sd (numpy)
    assert (center[1], scale[1]) == (7.0, 1.0)
    assert np.isnan(center[2]) and scale[2] == 1.0
    z = D.standardise(x, center, scale)
    assert np.isnan(z[:, 2]).all() and (z[:, 1] == 0.0).all()


def test_standardised_real_has_median_zero_and_unit_normal_iqr():
    rng = gen(3)
    x = rng.lognormal(2.0, 1.0, size=(1001, 4))
    z = D.standardise(x, *D.robust_scale(x))
    np.testing.assert_allclose(np.median(z, axis=0), 0.0, atol=1e-12)
    np.testing.assert_allclose(st.iqr(z, axis=0, scale="normal"), 1.0, rtol=1e-12)  # scipy


def test_complete_rows_hand_example():
    x = np.array([[1.0, 2.0, 3.0], [np.nan, 2.0, 3.0], [1.0, np.nan, 3.0], [1.0, 2.0, np.nan]])
    assert D.complete_rows(x).tolist() == [True, False, False, False]
    assert D.complete_rows(x, np.array([0, 2])).tolist() == [True, False, True, False]
    assert D.complete_rows(x, np.array([False, True, False])).tolist() == [True, True, False, True]


# ------------------------------------------------------------------------------------------------
# per feature


@pytest.mark.parametrize("n_a,n_b", [(300, 170), (57, 1000), (1, 40)])
def test_ks_and_wasserstein_equal_scipy(n_a, n_b):
    rng = gen(n_a + n_b)
    a = with_nans_and_ties(rng, n_a, 5)
    b = with_nans_and_ties(rng, n_b, 5, loc=0.3, sd=1.5, nan_share=0.2)
    a[:, 3] = np.round(a[:, 3])  # heavy ties
    b[:, 3] = np.round(b[:, 3])
    a[0, 4] = 0.5  # column 4 keeps one known value on side a
    ks = D.ks_per_feature(a, b)
    w1 = D.wasserstein_per_feature(a, b)
    for j in range(5):
        x, y = a[:, j][~np.isnan(a[:, j])], b[:, j][~np.isnan(b[:, j])]
        if x.size == 0 or y.size == 0:
            assert np.isnan(ks[j]) and np.isnan(w1[j])
            continue
        assert ks[j] == pytest.approx(st.ks_2samp(x, y).statistic, abs=1e-12)  # scipy.stats.ks_2samp
        assert w1[j] == pytest.approx(st.wasserstein_distance(x, y), abs=1e-12)  # scipy.stats.wasserstein_distance


def test_per_feature_is_nan_where_a_side_has_no_known_value():
    rng = gen(4)
    a = rng.normal(size=(50, 2))
    b = rng.normal(size=(60, 2))
    b[:, 1] = np.nan
    assert np.isnan(D.ks_per_feature(a, b)[1]) and np.isnan(D.wasserstein_per_feature(a, b)[1])
    assert np.isfinite(D.ks_per_feature(a, b)[0])


def test_ks_and_wasserstein_hand_example():
    # worked by hand: a = {0, 1}, b = {1, 2}: F_a - F_b is 1/2 on [0, 2), so KS = 1/2 and W1 = 1
    a, b = np.array([[0.0], [1.0]]), np.array([[1.0], [2.0]])
    assert D.ks_per_feature(a, b)[0] == 0.5
    assert D.wasserstein_per_feature(a, b)[0] == 1.0


# ------------------------------------------------------------------------------------------------
# energy distance


def energy_by_definition(x, y):
    """Székely & Rizzo: 2E|X-Y| - E|X-X'| - E|Y-Y'| over the empirical laws (all pairs)."""
    return 2 * cdist(x, y).mean() - cdist(x, x).mean() - cdist(y, y).mean()


def test_energy_in_1d_is_scipy_energy_distance_squared():
    # scipy.stats.energy_distance docs: it returns (2E|X-Y| - E|X-X'| - E|Y-Y'|)^(1/2)
    rng = gen(5)
    u, v = rng.normal(size=700), rng.gamma(2.0, 1.0, size=450)
    got = D.energy_distance(u, v, rng=rng)
    assert got == pytest.approx(st.energy_distance(u, v) ** 2, rel=1e-10)


def test_energy_hand_example_and_definition():
    # by hand: a = {0}, b = {1} in 1-D: 2*1 - 0 - 0 = 2
    assert D.energy_distance([0.0], [1.0], rng=gen()) == pytest.approx(2.0, rel=1e-15)
    rng = gen(6)
    x, y = rng.normal(size=(300, 4)), rng.normal(0.2, 1.0, size=(200, 4))
    assert D.energy_distance(x, y, rng=rng) == pytest.approx(energy_by_definition(x, y), rel=1e-10)


def test_energy_zero_for_identical_samples_and_grows_with_shift():
    rng = gen(7)
    x = rng.normal(size=(500, 6))
    assert D.energy_distance(x, x.copy(), rng=rng) == pytest.approx(0.0, abs=1e-12)
    y = rng.normal(size=(500, 6))
    values = [D.energy_distance(x, y + s, rng=rng) for s in (0.0, 0.25, 0.5, 1.0, 2.0)]
    assert values[0] > 0  # the V-statistic of two different samples is positive (Székely & Rizzo)
    assert all(b > a for a, b in itertools.pairwise(values))


def test_energy_uses_complete_rows_and_subsamples_deterministically():
    rng = gen(8)
    x, y = rng.normal(size=(3000, 3)), rng.normal(0.5, 1.0, size=(2500, 3))
    x[::7, 1] = np.nan
    full = energy_by_definition(x[~np.isnan(x).any(axis=1)], y)
    assert D.energy_distance(x, y, max_points=10_000, rng=gen(0)) == pytest.approx(full, rel=1e-10)
    a = D.energy_distance(x, y, max_points=500, rng=gen(9))
    assert a == D.energy_distance(x, y, max_points=500, rng=gen(9))
    assert a != D.energy_distance(x, y, max_points=500, rng=gen(10))
    assert a == pytest.approx(full, rel=0.3)  # a subsample estimates the same quantity


# ------------------------------------------------------------------------------------------------
# MMD


def mmd_by_definition(x, y, h):
    """Gretton et al. 2012, eq. 3 (unbiased MMD_u^2), Gaussian kernel exp(-d^2 / (2 h^2))."""
    m, n = len(x), len(y)
    kxx, kyy, kxy = (np.exp(-cdist(p, q, "sqeuclidean") / (2 * h * h)) for p, q in ((x, x), (y, y), (x, y)))
    return ((kxx.sum() - np.trace(kxx)) / (m * (m - 1)) + (kyy.sum() - np.trace(kyy)) / (n * (n - 1))
            - 2 * kxy.mean())


def test_mmd_equals_definition_and_median_heuristic():
    rng = gen(11)
    x, y = rng.normal(size=(200, 3)), rng.normal(0.3, 1.2, size=(150, 3))
    assert D.mmd_rbf(x, y, bandwidth=1.7, rng=rng) == pytest.approx(mmd_by_definition(x, y, 1.7), rel=1e-10)
    # Gretton et al. 2012: bandwidth = median distance between points of the aggregate sample
    h = np.median(pdist(np.concatenate([x, y])))
    assert D.mmd_rbf(x, y, rng=rng) == pytest.approx(mmd_by_definition(x, y, h), rel=1e-10)


def test_mmd_near_zero_under_the_null_and_positive_for_a_shift():
    rng = gen(12)
    x, y = rng.normal(size=(1000, 5)), rng.normal(size=(1000, 5))
    null = D.mmd_rbf(x, y, rng=rng)
    shifted = D.mmd_rbf(x, y + 0.5, rng=rng)
    # under the null MMD_u^2 is unbiased for 0 with spread O(1/n) (Gretton et al. 2012, Thm 8 / Sec. 5)
    assert abs(null) < 2e-3
    assert shifted > 20 * abs(null) and shifted > 0.01


# ------------------------------------------------------------------------------------------------
# permutation p-value


def test_permutation_pvalue_definition_for_a_clear_shift():
    rng = gen(13)
    x, y = rng.normal(size=(200, 4)), rng.normal(1.5, 1.0, size=(200, 4))
    # every permuted statistic is below the observed one: (1 + 0) / (1 + 200), the smallest value possible
    for stat in (functools.partial(D.energy_distance, rng=gen(1)), functools.partial(D.mmd_rbf, rng=gen(1))):
        assert D.permutation_pvalue(x, y, stat, rng=gen(2)) == 1 / 201


def test_permutation_pvalue_not_small_for_one_same_law_pair():
    rng = gen(14)
    x, y = rng.normal(size=(300, 4)), rng.normal(size=(300, 4))
    for stat in (functools.partial(D.energy_distance, rng=gen(1)), functools.partial(D.mmd_rbf, rng=gen(1))):
        assert D.permutation_pvalue(x, y, stat, rng=gen(3)) > 0.01


def test_permutation_pvalues_are_uniform_under_the_null():
    # a permutation p-value (1 + #{T* >= T}) / (1 + B) is uniform on {1/(B+1), ..., 1} under exchangeability
    # (standard result, from memory): over 200 same-law pairs about 5 % fall at or below 0.05 and half
    # below 0.5; the bounds are about 3 binomial sd wide
    ps = []
    for rep in range(200):
        rng = gen(1000 + rep)
        x, y = rng.normal(size=(25, 2)), rng.normal(size=(25, 2))
        ps.append(D.permutation_pvalue(x, y, functools.partial(D.mmd_rbf, rng=rng), n_permutations=99, rng=rng))
    ps = np.array(ps)
    assert np.mean(ps <= 0.05) <= 0.1
    assert 0.38 <= np.mean(ps <= 0.5) <= 0.62


def test_pooled_path_matches_the_generic_path():
    rng = gen(15)
    x, y = rng.normal(size=(60, 3)), rng.normal(0.2, 1.0, size=(50, 3))
    for f in (D.energy_distance, D.mmd_rbf):
        fast = D.permutation_pvalue(x, y, functools.partial(f, rng=gen(1)), n_permutations=300, rng=gen(4))

        def wrapped(a, b, f=f):  # not a partial, so the generic path runs
            return f(a, b, rng=gen(1))

        slow = D.permutation_pvalue(x, y, wrapped, n_permutations=300, rng=gen(4))
        assert fast == slow
        assert 1 / 301 < fast < 1  # the comparison is not trivial


def test_permutation_pvalue_with_any_statistic():
    rng = gen(16)
    x, y = rng.normal(size=(80, 2)), rng.normal(2.0, 1.0, size=(80, 2))
    p = D.permutation_pvalue(x, y, lambda a, b: float(np.nanmax(D.ks_per_feature(a, b))), n_permutations=50,
                             rng=rng)
    assert p == 1 / 51


# ------------------------------------------------------------------------------------------------
# PRDC


def prdc_by_definition(real, fake, k):
    """Kynkäänniemi et al. 2019 / Naeem et al. 2020 written out with full distance matrices."""
    real = real[~np.isnan(real).any(axis=1)]
    fake = fake[~np.isnan(fake).any(axis=1)]

    def dmat(p, q):
        return np.sqrt(((p[:, None, :] - q[None, :, :]) ** 2).sum(axis=-1))

    rr, ff, rf = dmat(real, real), dmat(fake, fake), dmat(real, fake)
    r_rad = np.sort(rr, axis=1)[:, k]  # column 0 is the point itself
    f_rad = np.sort(ff, axis=1)[:, k]
    in_ball = rf <= r_rad[:, None]  # [i, j]: fake j in the ball of real i
    real_in_fake = (rf <= f_rad[None, :]).any(axis=1)
    return {"precision": in_ball.any(axis=0).mean(), "recall": real_in_fake.mean(),
            "density": in_ball.sum() / (k * len(fake)), "coverage": in_ball.any(axis=1).mean(),
            "real_covered": in_ball.any(axis=1), "fake_inside": in_ball.any(axis=0), "real_radius": r_rad}


def assert_prdc_equal(got, ref):
    for name in ("precision", "recall", "density", "coverage"):
        assert getattr(got, name) == ref[name], name
    np.testing.assert_array_equal(got.real_covered, ref["real_covered"])
    np.testing.assert_array_equal(got.fake_inside, ref["fake_inside"])
    np.testing.assert_allclose(got.real_radius, ref["real_radius"], rtol=1e-14)


@pytest.mark.parametrize("n_real,n_fake,f,k,shift", [(300, 250, 3, 5, 0.5), (200, 310, 12, 3, 0.0),
                                                     (150, 150, 2, 1, 2.0), (400, 90, 6, 10, 0.3)])
def test_prdc_equals_brute_force(n_real, n_fake, f, k, shift):
    rng = gen(n_real * f + k)
    real = rng.normal(size=(n_real, f))
    fake = rng.normal(shift, 1.3, size=(n_fake, f))
    real[rng.random(n_real) < 0.05, 0] = np.nan
    got = D.prdc(real, fake, k=k)
    assert_prdc_equal(got, prdc_by_definition(real, fake, k))
    assert got.k == k
    np.testing.assert_array_equal(got.real_rows, np.flatnonzero(D.complete_rows(real)))
    np.testing.assert_array_equal(got.fake_rows, np.arange(n_fake))


def test_prdc_ties_and_duplicates_equal_brute_force():
    rng = gen(17)
    real = np.round(rng.normal(size=(300, 3)), 1)  # coarse grid: many equal distances
    fake = np.concatenate([real[:100], np.round(rng.normal(0.3, 1.0, size=(150, 3)), 1)])
    real = np.concatenate([real, real[:20]])  # duplicated real points: some radii are 0
    got = D.prdc(real, fake, k=3)
    assert_prdc_equal(got, prdc_by_definition(real, fake, 3))


def test_prdc_subsample_equals_brute_force_on_the_rows_drawn():
    rng = gen(18)
    real, fake = rng.normal(size=(900, 4)), rng.normal(0.2, 1.0, size=(700, 4))
    got = D.prdc(real, fake, k=4, max_points=300, rng=gen(5))
    assert len(got.real_rows) == len(got.fake_rows) == 300
    assert_prdc_equal(got, prdc_by_definition(real[got.real_rows], fake[got.fake_rows], 4))
    again = D.prdc(real, fake, k=4, max_points=300, rng=gen(5))
    np.testing.assert_array_equal(again.real_rows, got.real_rows)


def test_prdc_same_law_near_one():
    # Naeem et al. 2020 (from memory): for identical real and fake laws E[density] = 1 and
    # E[coverage] = 1 - prod_{i=1..k} (N - i) / (N + M - i), about 1 - 2^-k; precision and recall near 1
    rng = gen(19)
    n, k = 3000, 5
    got = D.prdc(rng.normal(size=(n, 4)), rng.normal(size=(n, 4)), k=k)
    expect_cov = 1 - np.prod([(n - i) / (2 * n - i) for i in range(1, k + 1)])
    assert got.coverage == pytest.approx(expect_cov, abs=0.02)
    assert got.density == pytest.approx(1.0, abs=0.1)
    assert got.precision > 0.95 and got.recall > 0.95


def test_prdc_disjoint_clouds_are_zero():
    # Kynkäänniemi et al. 2019 / Naeem et al. 2020: no fake point in any real ball and vice versa gives 0
    rng = gen(20)
    got = D.prdc(rng.normal(size=(500, 3)), rng.normal(50.0, 1.0, size=(400, 3)), k=5)
    assert (got.precision, got.recall, got.density, got.coverage) == (0.0, 0.0, 0.0, 0.0)
    assert not got.real_covered.any() and not got.fake_inside.any()


def test_prdc_flags_mark_a_hole_and_unrealistic_points():
    # two real clusters, fakes only near the first plus a few far away: the second cluster is a hole
    rng = gen(21)
    real = np.concatenate([rng.normal(0, 1, size=(300, 2)), rng.normal(20, 1, size=(300, 2))])
    fake = np.concatenate([rng.normal(0, 1, size=(300, 2)), rng.normal(-40, 1, size=(20, 2))])
    got = D.prdc(real, fake, k=5)
    assert got.real_covered[:300].mean() > 0.9 and not got.real_covered[300:].any()
    assert got.fake_inside[:300].mean() > 0.9 and not got.fake_inside[300:].any()


# ------------------------------------------------------------------------------------------------
# bad input


@pytest.mark.parametrize("call", [
    lambda a, b: D.ks_per_feature(a, b),
    lambda a, b: D.wasserstein_per_feature(a, b),
    lambda a, b: D.energy_distance(a, b, rng=gen()),
    lambda a, b: D.mmd_rbf(a, b, rng=gen()),
    lambda a, b: D.prdc(a, b),
    lambda a, b: D.permutation_pvalue(a, b, lambda x, y: 0.0, rng=gen()),
])
def test_mismatched_columns_and_empty_sets_are_refused(call):
    rng = gen(22)
    a, b = rng.normal(size=(20, 3)), rng.normal(size=(20, 3))
    with pytest.raises(TracegenError, match="'b'|'fake'"):
        call(a, b[:, :2])
    with pytest.raises(TracegenError, match="empty"):
        call(a, b[:0])
    with pytest.raises(TracegenError, match="empty"):
        call(a[:0], b)


def test_k_too_large_and_too_few_complete_rows_are_refused():
    rng = gen(23)
    real, fake = rng.normal(size=(6, 2)), rng.normal(size=(10, 2))
    with pytest.raises(TracegenError, match="'real'.*k=6"):
        D.prdc(real, fake, k=6)
    with pytest.raises(TracegenError, match="'k'"):
        D.prdc(real, fake, k=0)
    real[:, 0] = np.nan
    with pytest.raises(TracegenError, match="complete rows"):
        D.energy_distance(real, fake, rng=rng)
    with pytest.raises(TracegenError, match="complete rows"):
        D.mmd_rbf(fake, fake[:1], rng=rng)


def test_other_bad_arguments_are_refused():
    rng = gen(24)
    a, b = rng.normal(size=(30, 2)), rng.normal(size=(30, 2))
    with pytest.raises(TracegenError, match="'rng'"):
        D.energy_distance(a, b, rng=0)
    with pytest.raises(TracegenError, match="'bandwidth'"):
        D.mmd_rbf(a, b, bandwidth=0.0, rng=rng)
    with pytest.raises(TracegenError, match="'max_points'"):
        D.energy_distance(a, b, max_points=0, rng=rng)
    with pytest.raises(TracegenError, match="'rng'"):
        D.prdc(a, b, max_points=10)
    with pytest.raises(TracegenError, match="infinite"):
        D.ks_per_feature(np.array([[np.inf]]), b[:, :1])
    with pytest.raises(TracegenError, match="3-D"):
        D.robust_scale(np.zeros((2, 2, 2)))
    with pytest.raises(TracegenError, match="'scale'"):
        D.standardise(a, np.zeros(2), np.array([1.0, 0.0]))
    with pytest.raises(TracegenError, match="'n_permutations'"):
        D.permutation_pvalue(a, b, lambda x, y: 0.0, n_permutations=0, rng=rng)
    with pytest.raises(TracegenError, match="'columns'"):
        D.complete_rows(a, np.array([5]))

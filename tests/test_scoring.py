"""Scoring: exclusion, kNN scores, robust statistics, baseline fitting, attribution, online scoring."""

import dataclasses

import numpy as np
import pytest
from scipy.stats import median_abs_deviation

from fleetsift.featurizers import descriptors as de
from fleetsift.scoring import baseline as sc
from fleetsift.scoring import geometry
from fleetsift.errors import InputError


def fleet(seed=0, n_rec=4, per_rec=50, c=5, n_samples=120, outliers=()):
    """Synthetic fleet: windows of correlated channels; `outliers` = [(rec, window, channel)] get a 6x louder
    channel. Returns descriptors, rec ids, window centre times, the window arrays and groups."""
    rng = np.random.default_rng(seed)
    mix = np.eye(c) + 0.3 * rng.standard_normal((c, c))
    W = rng.standard_normal((n_rec * per_rec, n_samples, c)) @ mix
    for r, w, ch in outliers:
        W[r * per_rec + w, :, ch] *= 6.0
    rec = np.repeat(np.arange(n_rec), per_rec)
    t = np.tile(np.arange(per_rec) * 2.0 + 1.0, n_rec)
    D, groups = de.describe(W, kind="ledoit_wolf", include_mean=True, ridge=1e-6)
    return D, rec, t, W, groups


# ------------------------------------------------------------------------------------------ exclusion

def test_exclusion_mask():
    q_rec, q_t = np.array(["a", "a", "b"]), np.array([0.0, 10.0, 0.0])
    r_rec, r_t = np.array(["a", "a", "b", "c"]), np.array([0.0, 4.0, 50.0, 0.0])
    m = sc.exclusion_mask(q_rec, q_t, r_rec, r_t, zone_s=5.0)
    np.testing.assert_array_equal(m, [[True, True, False, False],
                                      [False, False, False, False],
                                      [False, False, False, False]])
    m_inf = sc.exclusion_mask(q_rec, q_t, r_rec, r_t, zone_s=np.inf)
    np.testing.assert_array_equal(m_inf, [[True, True, False, False],
                                          [True, True, False, False],
                                          [False, False, True, False]])
    # zone 0 still excludes the window itself.
    np.testing.assert_array_equal(sc.exclusion_mask(q_rec, q_t, r_rec, r_t, 0.0)[0], [True, False, False, False])
    with pytest.raises(InputError):
        sc.exclusion_mask(q_rec, q_t[:2], r_rec, r_t, 1.0)


# ---------------------------------------------------------------------------------- robust statistics

def test_robust_z_and_threshold_match_scipy_mad():
    # scipy.stats.median_abs_deviation(scale="normal") uses 1/Phi^-1(3/4) = 1.482602..., the constant we round
    # to 1.4826 (common practice), hence rtol 1e-5.
    rng = np.random.default_rng(1)
    ref = rng.gamma(2.0, 1.0, 301)
    d = rng.gamma(2.0, 1.0, 20)
    sigma = median_abs_deviation(ref, scale="normal")
    np.testing.assert_allclose(sc.robust_z(d, ref), (d - np.median(ref)) / sigma, rtol=1e-5)
    assert sc.threshold(ref, c=3.0) == pytest.approx(np.median(ref) + 3.0 * sigma, rel=1e-5)
    # Non-finite reference scores are ignored.
    assert sc.threshold(np.concatenate([ref, [np.nan, np.inf]])) == pytest.approx(sc.threshold(ref))


def test_robust_z_with_zero_mad_falls_back():
    ref = np.array([1.0, 1.0, 1.0, 1.0, 5.0])
    z = sc.robust_z(np.array([1.0, 3.0]), ref)
    # mean absolute deviation from the median = 0.8, scaled by sqrt(pi/2).
    np.testing.assert_allclose(z, [0.0, 2.0 / (0.8 * np.sqrt(np.pi / 2))])
    z0 = sc.robust_z(np.array([1.0, 2.0]), np.ones(4))
    assert z0[0] == 0 and np.isposinf(z0[1])


# ------------------------------------------------------------------------------------------ kNN scores

@pytest.mark.parametrize("metric", ["riemann", "logeuclid", "euclid"])
def test_knn_scores_against_brute_force(metric):
    D, rec, t, _, _ = fleet(2, n_rec=3, per_rec=30)
    Q, R = D[:30], D[30:]
    ex = sc.exclusion_mask(rec[:30], t[:30], rec[30:], t[30:], 10.0)
    P = geometry.pairwise_distance(Q, R, metric)
    P[ex] = np.inf
    S = np.sort(P, axis=1)
    np.testing.assert_allclose(sc.knn_scores(Q, R, 4, metric, "kth", ex), S[:, 3], atol=1e-10)
    np.testing.assert_allclose(sc.knn_scores(Q, R, 4, metric, "mean", ex), S[:, :4].mean(axis=1), atol=1e-10)


def test_knn_scores_nan_when_fewer_than_k_allowed():
    D, rec, t, _, _ = fleet(3, n_rec=2, per_rec=10)
    ex = sc.exclusion_mask(rec, t, rec, t, np.inf)
    ex[0, 10:17] = True  # query 0 keeps only 3 allowed references
    s = sc.knn_scores(D, D, 5, "riemann", "kth", ex)
    assert np.isnan(s[0]) and np.all(np.isfinite(s[1:]))
    assert np.isnan(sc.knn_scores(D, D, 5, "riemann", "mean", ex)[0])


def test_mean_scores_are_distances_to_the_mean():
    D, *_ = fleet(4, n_rec=1, per_rec=20)
    M = geometry.frechet_mean(D)
    np.testing.assert_allclose(sc.mean_scores(D, M), [float(geometry.distance(x, M)) for x in D], atol=1e-12)


def test_riemannian_potato_rejects_planted_outliers():
    D, *_ = fleet(5, n_rec=1, per_rec=60, outliers=[(0, 7, 1), (0, 33, 3), (0, 50, 0)])
    pot = sc.riemannian_potato(D, z_threshold=3.0)
    assert not pot.kept[[7, 33, 50]].any()
    assert pot.kept.sum() >= 50
    np.testing.assert_allclose(pot.mean, geometry.frechet_mean(D[pot.kept]), atol=1e-10)
    assert np.all(pot.z(D[[7, 33, 50]]) > 3.0)


# -------------------------------------------------------------------------------------------- baseline

PLANTED = [(0, 10, 2), (1, 25, 4), (2, 40, 0), (3, 5, 1)]


@pytest.mark.parametrize("metric,stat", [("riemann", "kth"), ("logeuclid", "mean"), ("euclid", "kth")])
def test_fit_baseline_trims_planted_outliers(metric, stat):
    D, rec, t, _, _ = fleet(6, outliers=PLANTED)
    planted = np.array([r * 50 + w for r, w, _ in PLANTED])
    bl = sc.fit_baseline(D, rec, t, k=5, metric=metric, stat=stat, zone_s=20.0, trim_fraction=0.05, c=3.0)
    assert bl.kept.sum() == len(D) - 10
    assert not bl.kept[planted].any()
    assert not np.isin(planted, bl.ref_index).any()
    np.testing.assert_array_equal(bl.references, D[bl.ref_index])
    # The threshold comes from the references' own leave-one-out scores.
    assert bl.threshold == pytest.approx(sc.threshold(bl.loo_scores, 3.0))
    s = sc.score(D, rec, t, bl)
    assert np.all(s[planted] > bl.threshold)
    assert np.mean(s[bl.kept] > bl.threshold) < 0.05
    # A reference scored against the baseline excludes itself and its neighbourhood: its score is its own
    # leave-one-out score.
    np.testing.assert_allclose(s[bl.ref_index], bl.loo_scores, atol=1e-10)
    if metric == "riemann":
        np.testing.assert_allclose(bl.mean, geometry.frechet_mean(bl.references), atol=1e-10)


def test_fit_baseline_max_refs_and_errors():
    D, rec, t, _, _ = fleet(7, n_rec=2, per_rec=30)
    bl = sc.fit_baseline(D, rec, t, k=3, metric="logeuclid", zone_s=5.0, trim_fraction=0.1, max_refs=20)
    assert len(bl.references) == 20 and bl.kept.sum() == 54
    with pytest.raises(InputError):  # each recording excluded entirely and only one recording: no neighbours
        sc.fit_baseline(D[:30], rec[:30], t[:30], k=3, zone_s=np.inf, trim_fraction=0.0)


# ------------------------------------------------------------------------------------------ attribution

def test_attribution_names_the_perturbed_channel():
    D, rec, t, W, groups = fleet(8, n_rec=1, per_rec=40)
    M = geometry.frechet_mean(D)
    Wp = W[:5].copy()
    Wp[:, :, 3] *= 4.0
    Dp, g = de.describe(Wp, kind="ledoit_wolf", include_mean=True, ridge=1e-6)
    shares = sc.attribute(Dp, M, g, 5)
    np.testing.assert_allclose(shares.sum(axis=1), 1.0, atol=1e-12)
    assert np.all(shares >= 0)
    assert np.all(np.argmax(shares, axis=1) == 3)
    tops = sc.top_channels(shares, ["ax", "ay", "az", "gx", "gy"], top=2)
    assert [row[0][0] for row in tops] == ["gx"] * 5
    assert len(tops[0]) == 2 and tops[0][0][1] >= tops[0][1][1]
    # Equal shares when the window is the mean itself.
    np.testing.assert_allclose(sc.attribute(M[None], M, groups, 5), np.full((1, 5), 0.2))


def test_attribution_row_energy_by_hand():
    # Shares are the group sums of the squared row norms of logm(M^-1/2 X M^-1/2) over real-channel rows.
    rng = np.random.default_rng(9)
    X = rng.standard_normal((3, 4, 4))
    X = X @ X.transpose(0, 2, 1) + np.eye(4)
    M = np.eye(4) * 2.0
    groups = np.array([0, 1, 1, -1])
    L = geometry.logm(X / 2.0)
    E = (L ** 2).sum(axis=2)
    want = np.stack([E[:, 0], E[:, 1] + E[:, 2]], axis=1)
    want /= want.sum(axis=1, keepdims=True)
    np.testing.assert_allclose(sc.attribute(X, M, groups, 2), want, rtol=1e-12)


# ------------------------------------------------------------------------------------------------ online

@pytest.mark.parametrize("metric", ["riemann", "logeuclid", "euclid"])
def test_online_scorer_equals_batch(metric):
    D, rec, t, _, _ = fleet(10, n_rec=3, per_rec=30)
    bl = sc.fit_baseline(D[:60], rec[:60], t[:60], k=4, metric=metric, zone_s=10.0, trim_fraction=0.1)
    online = sc.OnlineScorer(bl)
    batch = sc.score(D, rec, t, bl)
    got = np.array([online.score(D[i], rec[i], t[i]) for i in range(len(D))])
    np.testing.assert_allclose(got, batch, atol=1e-10)
    # After updates, the online score equals the batch score against the grown reference set.
    for i in range(60, 75):
        online.update(D[i], rec[i], t[i])
    grown = dataclasses.replace(bl, references=np.concatenate([bl.references, D[60:75]]),
                                ref_rec_ids=np.concatenate([bl.ref_rec_ids, rec[60:75]]),
                                ref_times=np.concatenate([bl.ref_times, t[60:75]]))
    want = sc.score(D[75:], rec[75:], t[75:], grown)
    got = np.array([online.score(D[i], rec[i], t[i]) for i in range(75, 90)])
    np.testing.assert_allclose(got, want, atol=1e-10)


def test_online_running_mean_and_bound():
    D, rec, t, _, _ = fleet(11, n_rec=2, per_rec=20)
    bl = sc.fit_baseline(D[:20], rec[:20], t[:20], k=3, metric="euclid", zone_s=3.0, trim_fraction=0.0)
    online = sc.OnlineScorer(bl, max_refs=25)
    for i in range(20, 40):
        online.update(D[i], rec[i], t[i])
    # A geodesic step of 1/n is the exact recursive arithmetic mean for the flat metric.
    np.testing.assert_allclose(online.mean, D.mean(axis=0), atol=1e-12)
    assert len(online.references) == 25
    np.testing.assert_array_equal(online.references, D[15:40])  # oldest dropped first
    # Riemann: the recursive (inductive) mean approaches the Karcher mean for concentrated data.
    blr = sc.fit_baseline(D[:20], rec[:20], t[:20], k=3, metric="riemann", zone_s=3.0, trim_fraction=0.0)
    onr = sc.OnlineScorer(blr)
    for i in range(20, 40):
        onr.update(D[i], rec[i], t[i])
    assert float(geometry.distance(onr.mean, geometry.frechet_mean(D))) < 0.02

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
    D, groups = de.describe(W, kind="covariance", include_mean=True, ridge=1e-6)
    return D, rec, t, W, groups


# ------------------------------------------------------------------------------------------ exclusion

def test_exclusion_mask():
    q_rec, q_t = np.array(["a", "a", "b"]), np.array([0.0, 10.0, 0.0])
    r_rec, r_t = np.array(["a", "a", "b", "c"]), np.array([0.0, 4.0, 50.0, 0.0])
    m = sc.exclusion_mask(q_rec, q_t, r_rec, r_t, exclusion_s=5.0)
    np.testing.assert_array_equal(m, [[True, True, False, False],
                                      [False, False, False, False],
                                      [False, False, False, False]])
    m_inf = sc.exclusion_mask(q_rec, q_t, r_rec, r_t, exclusion_s=np.inf)
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
    bl = sc.fit_baseline(D, rec, t, k=5, metric=metric, stat=stat, exclusion_s=20.0, trim_fraction=0.05, c=3.0)
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
    bl = sc.fit_baseline(D, rec, t, k=3, metric="logeuclid", exclusion_s=5.0, trim_fraction=0.1, max_refs=20)
    assert len(bl.references) == 20 and bl.kept.sum() == 54
    with pytest.raises(InputError):  # each recording excluded entirely and only one recording: no neighbours
        sc.fit_baseline(D[:30], rec[:30], t[:30], k=3, exclusion_s=np.inf, trim_fraction=0.0)


# ------------------------------------------------------------------------------------------ attribution

def test_attribution_names_the_perturbed_channel():
    D, rec, t, W, groups = fleet(8, n_rec=1, per_rec=40)
    M = geometry.frechet_mean(D)
    Wp = W[:5].copy()
    Wp[:, :, 3] *= 4.0
    Dp, g = de.describe(Wp, kind="covariance", include_mean=True, ridge=1e-6)
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
    bl = sc.fit_baseline(D[:60], rec[:60], t[:60], k=4, metric=metric, exclusion_s=10.0, trim_fraction=0.1)
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
    bl = sc.fit_baseline(D[:20], rec[:20], t[:20], k=3, metric="euclid", exclusion_s=3.0, trim_fraction=0.0)
    online = sc.OnlineScorer(bl, max_refs=25)
    for i in range(20, 40):
        online.update(D[i], rec[i], t[i])
    # A geodesic step of 1/n is the exact recursive arithmetic mean for the flat metric.
    np.testing.assert_allclose(online.mean, D.mean(axis=0), atol=1e-12)
    assert len(online.references) == 25
    np.testing.assert_array_equal(online.references, D[15:40])  # oldest dropped first
    # Riemann: the recursive (inductive) mean approaches the Karcher mean for concentrated data.
    blr = sc.fit_baseline(D[:20], rec[:20], t[:20], k=3, metric="riemann", exclusion_s=3.0, trim_fraction=0.0)
    onr = sc.OnlineScorer(blr)
    for i in range(20, 40):
        onr.update(D[i], rec[i], t[i])
    assert float(geometry.distance(onr.mean, geometry.frechet_mean(D))) < 0.02


# ------------------------------------------------------------------------ neighbours counted in recordings

def _per_group_bruteforce(P, groups, k):
    """For each row: the k smallest of (min distance to each group), with that group's argmin."""
    out_d, out_i = [], []
    for row in P:
        best = {}
        for j, (d, g) in enumerate(zip(row, groups)):
            if np.isfinite(d) and (g not in best or d < best[g][0]):
                best[g] = (d, j)
        pick = sorted(best.values())[:k]
        out_d.append([p[0] for p in pick] + [np.inf] * (k - len(pick)))
        out_i.append([p[1] for p in pick] + [-1] * (k - len(pick)))
    return np.array(out_d), np.array(out_i)


@pytest.mark.parametrize("metric", ["riemann", "logeuclid", "euclid"])
def test_query_groups_is_the_nearest_window_of_each_nearest_recording(metric):
    from fleetsift.scoring.index import KNNIndex

    D, rec, t, _, _ = fleet(12, n_rec=6, per_rec=25)
    Q, R, g = D[:40], D[40:], rec[40:]
    ex = np.random.default_rng(0).random((40, len(R))) < 0.3
    d, i = KNNIndex(R, metric).query_groups(Q, 3, g, exclude=ex)
    P = geometry.pairwise_distance(Q, R, metric)
    P[ex] = np.inf
    want_d, want_i = _per_group_bruteforce(P, g, 3)
    np.testing.assert_allclose(d, want_d, atol=1e-10)
    np.testing.assert_array_equal(i, want_i)
    assert all(len(set(g[row])) == 3 for row in i)  # one neighbour per recording


def test_recording_unit_sees_a_fault_recurring_in_fewer_than_k_recordings():
    # The same fault (a stuck, 6x louder channel: nearly identical windows) in 5 windows of each of 2 recordings
    # out of 6. Counted in windows, a faulty window finds 3 faulty neighbours (the 5 of the other recording),
    # closer than normal windows are to theirs, and scores below normal; counted in recordings, its 3rd nearest
    # recording is a normal one.
    D, rec, t, _, _ = fleet(13, n_rec=6, per_rec=40)
    fi = np.array([r * 40 + w for r in (1, 4) for w in range(20, 25)])
    G = np.diag([1.0, 1.0, 6.0, 1.0, 1.0, 1.0])
    F = G @ D[0] @ G
    rng = np.random.default_rng(0)
    T = rng.normal(0, 0.01, (len(fi), 6, 6))
    D[fi] = geometry.exp_map(0.5 * (T + T.transpose(0, 2, 1)), F)
    fault = np.zeros(len(D), bool)
    fault[fi] = True
    ex = sc.exclusion_mask(rec, t, rec, t, 15.0)
    s_win = sc.knn_scores(D, D, 3, "riemann", "kth", ex, unit="window")
    s_rec = sc.knn_scores(D, D, 3, "riemann", "kth", ex, unit="recording", ref_groups=rec)
    from sklearn.metrics import roc_auc_score

    assert roc_auc_score(fault, s_win) < 0.2  # masked: the fault looks denser than normal operation
    assert roc_auc_score(fault, s_rec) == 1.0
    # In recordings the k-th distance is never below the k-th distance in windows.
    assert np.all(s_rec >= s_win - 1e-12)


def test_recording_unit_with_fewer_recordings_than_k_uses_those_it_has():
    D, rec, t, _, _ = fleet(14, n_rec=2, per_rec=20)
    ex = sc.exclusion_mask(rec, t, rec, t, np.inf)  # only the other recording is allowed
    s = sc.knn_scores(D, D, 3, "riemann", "kth", ex, unit="recording", ref_groups=rec)
    P = geometry.pairwise_distance(D, D)
    P[ex] = np.inf
    np.testing.assert_allclose(s, P.min(axis=1), atol=1e-10)  # the one recording it has
    with pytest.raises(InputError, match="ref_groups"):
        sc.knn_scores(D, D, 3, "riemann", "kth", ex, unit="recording")


# ------------------------------------------------------------------------------------- density and mean

def test_density_scores_are_sklearns_local_outlier_factor():
    # Breunig et al. 2000 as scikit-learn's LocalOutlierFactor computes it, on precomputed riemann distances:
    # the references' leave-one-out factors and new windows' (novelty) factors.
    from sklearn.neighbors import LocalOutlierFactor

    D, rec, t, _, _ = fleet(15, n_rec=1, per_rec=60, outliers=[(0, 5, 1)])
    R, Q = D[:45], D[45:]
    ids = np.arange(60).astype(str)  # one recording per window: only the window itself is excluded
    bl = sc.fit_references(R, ids[:45], np.zeros(45), k=5, metric="riemann", exclusion_s=0.0, method="density",
                           unit="window")
    lof = LocalOutlierFactor(n_neighbors=5, metric="precomputed").fit(geometry.pairwise_distance(R, R))
    np.testing.assert_allclose(bl.loo_scores, -lof.negative_outlier_factor_, rtol=1e-7)
    nov = LocalOutlierFactor(n_neighbors=5, metric="precomputed", novelty=True).fit(geometry.pairwise_distance(R, R))
    got = sc.raw_scores(Q, ids[45:], np.zeros(15), bl)
    np.testing.assert_allclose(got, -nov.score_samples(geometry.pairwise_distance(Q, R)), rtol=1e-7)
    assert np.argmax(bl.loo_scores) == 5


def test_mean_method_is_the_distance_to_the_references_frechet_mean():
    # Checked against pyriemann's Karcher mean and affine-invariant distance (pyriemann.geometry).
    from pyriemann.geometry.distance import distance_riemann
    from pyriemann.geometry.mean import mean_riemann

    D, rec, t, _, _ = fleet(16, n_rec=3, per_rec=30, outliers=[(1, 3, 0)])
    bl = sc.fit_baseline(D, rec, t, k=3, metric="riemann", exclusion_s=10.0, trim_fraction=0.1, method="frechet_mean")
    M = mean_riemann(bl.references)
    np.testing.assert_allclose(bl.mean, M, atol=1e-8)
    want = np.array([distance_riemann(x, M) for x in D])
    np.testing.assert_allclose(sc.score(D, rec, t, bl), want, atol=1e-8)
    assert 33 in set(np.flatnonzero(~bl.kept))  # the planted outlier is trimmed
    z = sc.zscore(sc.score(D, rec, t, bl), bl)
    assert z[33] > bl.c and np.median(z[bl.kept]) == pytest.approx(0.0, abs=0.5)


@pytest.mark.parametrize("method", ["knn", "density", "frechet_mean"])
def test_zscore_over_c_is_the_threshold_in_the_methods_units(method):
    D, rec, t, _, _ = fleet(17, n_rec=4, per_rec=30, outliers=PLANTED[:2])
    bl = sc.fit_baseline(D, rec, t, k=3, exclusion_s=10.0, trim_fraction=0.1, method=method, unit="recording", c=3.0)
    raw = sc.score(D, rec, t, bl)
    z = sc.zscore(raw, bl)
    np.testing.assert_array_equal(z > 3.0, raw > bl.threshold)
    # The references' own leave-one-out scores are centred at 0 with robust sigma 1.
    zr = sc.zscore(bl.loo_scores, bl)
    assert np.median(zr) == pytest.approx(0.0, abs=1e-12)
    assert np.median(np.abs(zr)) * 1.4826 == pytest.approx(1.0, rel=1e-3)


def test_methods_and_units_give_different_scores():
    D, rec, t, _, _ = fleet(18, n_rec=4, per_rec=30, outliers=PLANTED[:2])
    out = {}
    for method in ("knn", "density", "frechet_mean"):
        for unit in ("recording", "window"):
            bl = sc.fit_baseline(D, rec, t, k=3, exclusion_s=10.0, trim_fraction=0.1, method=method, unit=unit)
            out[method, unit] = sc.zscore(sc.score(D, rec, t, bl), bl)
    keys = list(out)
    for i, a in enumerate(keys):
        for b in keys[i + 1:]:
            if a[0] == b[0] == "frechet_mean":
                continue  # the distance to the mean counts no neighbours
            assert not np.allclose(out[a], out[b]), (a, b)
    with pytest.raises(InputError, match="method"):
        sc.fit_baseline(D, rec, t, method="potato")


def test_approved_windows_stop_a_false_alarm():
    # A window reviewed as normal: itself and windows like it score no more than their distance to it.
    D, rec, t, _, _ = fleet(19, n_rec=4, per_rec=30, outliers=[(2, 10, 3)])
    bl = sc.fit_baseline(D, rec, t, k=3, exclusion_s=10.0, trim_fraction=0.1)
    i = 2 * 30 + 10
    assert sc.zscore(sc.score(D[i:i + 1], rec[i:i + 1], t[i:i + 1], bl), bl)[0] > bl.c
    bl.approved = D[i:i + 1]
    assert sc.score(D[i:i + 1], rec[i:i + 1], t[i:i + 1], bl)[0] == pytest.approx(0.0, abs=1e-7)
    others = np.delete(np.arange(len(D)), i)
    before = dataclasses.replace(bl, approved=None)
    np.testing.assert_array_less(sc.score(D[others], rec[others], t[others], bl) - 1e-12,
                                 sc.score(D[others], rec[others], t[others], before) + 1e-12)


@pytest.mark.parametrize("method,unit", [("knn", "recording"), ("frechet_mean", "window"), ("density", "recording")])
def test_online_scorer_equals_batch_for_every_method(method, unit):
    D, rec, t, _, _ = fleet(20, n_rec=3, per_rec=30)
    bl = sc.fit_baseline(D[:60], rec[:60], t[:60], k=3, exclusion_s=10.0, trim_fraction=0.1, method=method, unit=unit)
    online = sc.OnlineScorer(bl)
    got = np.array([online.score(D[i], rec[i], t[i]) for i in range(len(D))])
    np.testing.assert_allclose(got, sc.score(D, rec, t, bl), atol=1e-10)
    if method == "density":
        with pytest.raises(InputError, match="density"):
            online.update(D[0], rec[0], t[0])

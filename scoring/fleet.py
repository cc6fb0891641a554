"""Fleet-level computation: channels on the common clock -> windows -> SPD descriptors -> baseline -> scores.

Pure functions (no Prefect). Inputs are the cached per-recording stage outputs; the output is everything the
results store needs, per window and per metric.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field

import numpy as np

from fleetsift.featurizers import descriptors as desc
from fleetsift.featurizers.pca import fit_pca
from fleetsift.featurizers.tables import cut_windows, place_on_clock, window_starts
from fleetsift.scoring import baseline
from fleetsift.vocabulary import METRICS


@dataclass
class RecordingFeatures:
    """One recording's cached stage outputs, ready for the fleet step."""

    recording_id: str
    t: np.ndarray  # common clock, seconds from the recording's first sample
    table_values: np.ndarray  # (n, c_tab) calibrated, resampled
    table_valid: np.ndarray  # (n,)
    table_channels: list[str]
    # per video stream: (stream name, frame times on the common clock (offset applied, relative), embeddings)
    videos: list[tuple[str, np.ndarray, np.ndarray]] = field(default_factory=list)


@dataclass
class FleetBaseline:
    baseline_id: str
    channels: list[str]
    center: np.ndarray
    scale: np.ndarray
    pca: dict[str, dict[str, np.ndarray]]  # per video stream
    per_metric: dict[str, baseline.Baseline]
    reference_recordings: list[str]


@dataclass
class WindowScores:
    recording_id: str
    t_start: np.ndarray
    t_end: np.ndarray
    valid: np.ndarray
    scores: dict[str, np.ndarray]  # metric -> (n_windows,) (nan where invalid)
    flagged: dict[str, np.ndarray]
    top_channels: list[str]  # per window, "ch:share,..." for the primary metric ("" where invalid)
    shares: np.ndarray | None = None  # (n_windows, n_channels) primary-metric attribution


@dataclass
class FleetResult:
    baseline: FleetBaseline
    windows: list[WindowScores]
    channels: list[str]


def video_gap_s(sample_hz: float, max_gap_s: float) -> float:
    # Embeddings come at the sampling rate: tolerate two missing samples before calling it a gap (common practice).
    return max(max_gap_s, 2.5 / sample_hz)


def video_channels(emb: np.ndarray, pca: dict[str, np.ndarray]) -> np.ndarray:
    """Per frame: the PCA scores of its embedding plus the log of its squared distance to the PCA subspace.

    The residual (the Q statistic of PCA process monitoring, Jackson & Mudholkar 1979) carries what the baseline's
    principal components cannot express, such as an object never seen in normal operation; the leading scores
    mostly follow where the vehicle is. The log makes its distribution closer to symmetric (common practice).
    """
    n_comp = pca["components"].shape[0]
    if len(emb) == 0:
        return np.zeros((0, n_comp + 1))
    x = emb.astype(np.float64) - pca["mean"]
    z = x @ pca["components"].T
    resid = np.maximum((x * x).sum(axis=1) - (z * z).sum(axis=1), 1e-12)
    return np.column_stack([z, np.log(resid)])


def channel_matrix(rec: RecordingFeatures, pca: dict[str, dict[str, np.ndarray]], video_gaps: dict[str, float]
                   ) -> tuple[np.ndarray, np.ndarray, list[str]]:
    """All channels of one recording on its clock: table channels then each video's PCA components."""
    cols = [rec.table_values]
    valid = rec.table_valid.copy()
    names = list(rec.table_channels)
    for name, t_frames, emb in rec.videos:
        z = video_channels(emb, pca[name])
        zc, zv = place_on_clock(t_frames, z, rec.t, video_gaps[name])
        cols.append(zc)
        valid &= zv
        names += [f"{name}.pc{i + 1}" for i in range(pca[name]["components"].shape[0])] + [f"{name}.residual"]
    return np.column_stack(cols), valid, names


def fit_standardiser(mats: list[np.ndarray], valids: list[np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    x = np.concatenate([m[v] for m, v in zip(mats, valids)], axis=0)
    if len(x) < 2:
        raise ValueError("no valid samples to fit the channel standardisation")
    center = x.mean(axis=0)
    scale = x.std(axis=0)
    # A channel constant over the whole baseline carries no information; scale 1 keeps it finite and the
    # descriptor's shrinkage keeps the matrix strictly PD.
    scale = np.where(scale > 1e-12 * max(1.0, float(np.abs(center).max(initial=0.0))), scale, 1.0)
    return center, scale


def recording_windows(x: np.ndarray, valid: np.ndarray, t: np.ndarray, rate_hz: float, window_s: float,
                      hop_s: float) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    starts, w = window_starts(len(t), rate_hz, window_s, hop_s)
    wins, ok = cut_windows(x, valid, starts, w)
    t_start = t[starts] if len(starts) else np.empty(0)
    t_end = t_start + w / rate_hz
    return wins, ok, t_start, t_end


def _baseline_id(center, scale, pca, refs_by_metric) -> str:
    h = hashlib.sha256()
    for a in (center, scale):
        h.update(np.ascontiguousarray(a, np.float64).tobytes())
    for name in sorted(pca):
        for k in sorted(pca[name]):
            h.update(np.ascontiguousarray(pca[name][k], np.float64).tobytes())
    for m in sorted(refs_by_metric):
        h.update(np.ascontiguousarray(refs_by_metric[m].references).tobytes())
        h.update(np.float64(refs_by_metric[m].threshold).tobytes())
    return "b-" + h.hexdigest()[:12]


def score_fleet(recs: list[RecordingFeatures], *, windowing, descriptor, scoring_cfg, pca_dims: dict[str, int],
                video_gaps: dict[str, float], baseline_recordings: list[str] | None = None,
                metrics=METRICS) -> FleetResult:
    """Fit the fleet's baseline on the batch (robustly, or on the chosen recordings) and score every window."""
    if not recs:
        raise ValueError("no recordings to score")
    base_ids = set(baseline_recordings or [r.recording_id for r in recs])
    base = [r for r in recs if r.recording_id in base_ids]
    if not base:
        raise ValueError(f"none of the baseline recordings {sorted(base_ids)} is in this batch")

    # PCA of each video stream's embeddings, fitted on the baseline recordings' frames.
    pca: dict[str, dict[str, np.ndarray]] = {}
    for name, dim in pca_dims.items():
        frames = [emb for r in base for (n, _, emb) in r.videos if n == name and len(emb)]
        if not frames:
            raise ValueError(f"video stream {name!r}: no frames in the baseline recordings to fit its PCA")
        allf = np.concatenate(frames).astype(np.float64)
        pca[name] = fit_pca(allf, min(dim, allf.shape[0] - 1, allf.shape[1]))

    mats, valids, names = [], [], None
    for r in recs:
        x, v, n = channel_matrix(r, pca, video_gaps)
        if names is None:
            names = n
        elif n != names:
            raise ValueError(f"{r.recording_id}: channels {n} differ from the fleet's {names}")
        mats.append(x)
        valids.append(v)
    assert names is not None
    is_base = np.array([r.recording_id in base_ids for r in recs])

    def describe_all(center, scale):
        out = []
        for r, x, v in zip(recs, mats, valids):
            z = (x - center) / scale
            wins, ok, t0, t1 = recording_windows(z, v, r.t, windowing.rate_hz, windowing.window_s, windowing.hop_s)
            if ok.any():
                d, groups = desc.describe(wins[ok], kind=descriptor.kind, include_mean=descriptor.include_mean,
                                          lags=descriptor.lags, ridge=descriptor.ridge)
            else:
                d, groups = None, None
            out.append((wins, ok, t0, t1, d, groups))
        return out

    def stack(per):
        ds_, rec_ids, times, owner = [], [], [], []
        for i, (wins, ok, t0, t1, d, _) in enumerate(per):
            if d is None:
                continue
            ds_.append(d)
            rec_ids += [i] * len(d)
            times.append(((t0 + t1) / 2)[ok])
            owner.append(np.full(len(d), i))
        if not ds_:
            raise ValueError("no valid window in the batch (every window straddles a gap or is too short)")
        return np.concatenate(ds_), np.asarray(rec_ids), np.concatenate(times), np.concatenate(owner)

    primary = scoring_cfg.metric
    # Pass 1: standardise on all baseline samples, score leave-one-out, find the windows to trim.
    center, scale = fit_standardiser([m for m, b in zip(mats, is_base) if b], [v for v, b in zip(valids, is_base) if b])
    per = describe_all(center, scale)
    D, rec_idx, times, _ = stack(per)
    in_base = is_base[rec_idx]
    bl = baseline.fit_baseline(D[in_base], rec_idx[in_base], times[in_base], k=scoring_cfg.k, metric=primary,
                              stat=scoring_cfg.knn_stat, zone_s=scoring_cfg.exclusion_s,
                              trim_fraction=scoring_cfg.trim_fraction, c=scoring_cfg.threshold_c)
    # Pass 2: refit the standardisation on the kept windows only, so planted/unknown anomalies do not inflate it.
    if scoring_cfg.trim_fraction > 0:
        base_pos = np.flatnonzero(in_base)
        kept = np.zeros(len(D), bool)
        kept[base_pos[bl.kept]] = True
        kept_samples = []
        for i, (wins, ok, t0, t1, d, _) in enumerate(per):
            if d is None:
                continue
            sel = kept[rec_idx == i]
            if is_base[i] and sel.any():
                kept_samples.append(wins[ok][sel].reshape(-1, wins.shape[2]) * scale + center)
        if kept_samples:
            center, scale = fit_standardiser(kept_samples, [np.ones(len(x), bool) for x in kept_samples])
        per = describe_all(center, scale)
        D, rec_idx, times, _ = stack(per)
        in_base = is_base[rec_idx]

    per_metric: dict[str, baseline.Baseline] = {}
    for m in metrics:
        per_metric[m] = baseline.fit_baseline(D[in_base], rec_idx[in_base], times[in_base], k=scoring_cfg.k, metric=m,
                                             stat=scoring_cfg.knn_stat, zone_s=scoring_cfg.exclusion_s,
                                             trim_fraction=scoring_cfg.trim_fraction, c=scoring_cfg.threshold_c)
    scores_all = {m: baseline.score(D, rec_idx, times, per_metric[m]) for m in metrics}
    groups = next(g for (_, _, _, _, d, g) in per if d is not None)
    shares = baseline.attribute(D, per_metric[primary].mean, groups, len(names))

    bid = _baseline_id(center, scale, pca, per_metric)
    fb = FleetBaseline(baseline_id=bid, channels=names, center=center, scale=scale, pca=pca, per_metric=per_metric,
                       reference_recordings=sorted(base_ids))
    out: list[WindowScores] = []
    for i, (r, (wins, ok, t0, t1, d, _)) in enumerate(zip(recs, per)):
        nw = len(t0)
        sel = rec_idx == i
        sc, fl = {}, {}
        for m in metrics:
            s = np.full(nw, np.nan)
            s[ok] = scores_all[m][sel]
            sc[m] = s
            fl[m] = np.where(ok, s > per_metric[m].threshold, False)
        sh = np.full((nw, len(names)), np.nan)
        sh[ok] = shares[sel]
        tops = []
        for j in range(nw):
            if not ok[j]:
                tops.append("")
                continue
            order = np.argsort(-sh[j])[: scoring_cfg.top_channels]
            tops.append(",".join(f"{names[c]}:{sh[j, c]:.3f}" for c in order))
        out.append(WindowScores(recording_id=r.recording_id, t_start=t0, t_end=t1, valid=ok, scores=sc, flagged=fl,
                                top_channels=tops, shares=sh))
    return FleetResult(baseline=fb, windows=out, channels=names)

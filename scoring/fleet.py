"""Fleet-level computation: channels on the common clock -> windows -> SPD descriptors -> baseline -> scores.

Pure functions (no Prefect). Inputs are the cached per-recording stage outputs and, from the second night on,
earlier nights' banks (scoring.history); the output is everything the results store needs, per window and per
metric, plus tonight's bank.

A night is scored in a *descriptor space*: the channel standardisation, the video PCA basis and the noise floor
(ridge) of each descriptor block. The first night (or a night whose profile changed what the descriptors are)
fits the space on its own batch, robustly; later nights reuse it, so their windows compare with earlier nights'.
"""

from __future__ import annotations

import hashlib
import warnings
from dataclasses import dataclass, field

import numpy as np

from fleetsift.featurizers import descriptors as desc
from fleetsift.profile import BaselineSpec
from fleetsift.featurizers.pca import fit_pca
from fleetsift.featurizers.tables import cut_windows, place_on_clock, window_starts
from fleetsift.scoring import baseline
from fleetsift.scoring import novelty as nov
from fleetsift.scoring.history import Bank, References, Reviews, assemble, guard_band, verdicts_for
from fleetsift.vocabulary import METRICS

# Bump when what a bank's descriptors mean changes, so no later night compares with banks of the old meaning.
SPACE_VERSION = 2  # 2: the space keeps each video stream's reference frames (frame novelty)
# More than this share of tonight's windows flagged against the history alone: the history is not tonight's
# operation (common practice: a fault concerns a minority of windows).
UNLIKE_HISTORY_MAX = 0.5


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
    content: str = ""  # the recording's content hash: its identity across nights (defaults to its name)

    @property
    def identity(self) -> str:
        return self.content or self.recording_id


@dataclass
class Space:
    """What turns a recording's channels into descriptors; shared by the nights of one history."""

    key: str  # the profile sections and code the descriptors depend on (given by the caller)
    channels: list[str]
    center: np.ndarray
    scale: np.ndarray
    pca: dict[str, dict[str, np.ndarray]]  # per video stream
    blocks: dict[str, list[int]]  # descriptor block (stream) -> channel positions
    ridges: dict[str, float]  # block -> noise floor added to its window covariances
    novelty: dict[str, nov.FrameBank] = field(default_factory=dict)  # per video stream: reference frames

    def to_arrays(self) -> dict[str, np.ndarray]:
        out = {"space.key": np.array(self.key), "space.channels": np.array(self.channels),
               "space.center": self.center, "space.scale": self.scale,
               "space.blocks": np.array(list(self.blocks)),
               "space.ridges": np.array([self.ridges[b] for b in self.blocks], np.float64)}
        for b, ix in self.blocks.items():
            out[f"space.block.{b}"] = np.asarray(ix, np.int64)
        for name, p in self.pca.items():
            for k, v in p.items():
                out[f"space.pca.{name}.{k}"] = v
        for name, fb in self.novelty.items():
            out.update(fb.to_arrays(f"space.novelty.{name}"))
        return out

    @classmethod
    def from_arrays(cls, a: dict[str, np.ndarray]) -> "Space":
        blocks = [str(b) for b in a["space.blocks"]]
        pca: dict[str, dict[str, np.ndarray]] = {}
        for k, v in a.items():
            if k.startswith("space.pca."):
                name, part = k[len("space.pca."):].rsplit(".", 1)
                pca.setdefault(name, {})[part] = v
        banks = {k[len("space.novelty."):-len(".robust")]: nov.FrameBank.from_arrays(
            a, k[:-len(".robust")]) for k in a if k.startswith("space.novelty.") and k.endswith(".robust")}
        return cls(key=str(a["space.key"]), channels=[str(c) for c in a["space.channels"]],
                   center=a["space.center"], scale=a["space.scale"], pca=pca,
                   blocks={b: a[f"space.block.{b}"].astype(int).tolist() for b in blocks},
                   ridges={b: float(r) for b, r in zip(blocks, a["space.ridges"])}, novelty=banks)


@dataclass
class BaselineInfo:
    """Which references tonight's scores were measured against (reported in the JSON, the store, the report)."""

    source: str  # history | batch | recordings
    n_references: int
    n_reference_recordings: int
    reference_runs: list[str]  # earlier runs whose windows are among the references
    tonight: bool  # tonight's batch is among the references (a first night, or a thin history)
    n_approved: int  # windows reviewed as normal that count as references
    space_fitted: bool  # the descriptor space was fitted tonight (first night or a profile change)
    ridges: dict[str, float]
    k: int
    # share of tonight's windows over the threshold against the history alone (nan when tonight was a reference
    # from the start)
    unlike_history: float = float("nan")
    # per video stream: how many reference frames its frame novelty is measured against, from how many recordings
    novelty_frames: dict[str, list[int]] = field(default_factory=dict)

    def to_dict(self) -> dict:
        return {"source": self.source, "n_references": self.n_references,
                "n_reference_recordings": self.n_reference_recordings, "reference_runs": self.reference_runs,
                "tonight": self.tonight, "n_approved": self.n_approved, "space_fitted": self.space_fitted,
                "ridges": self.ridges, "k": self.k,
                "unlike_history": None if np.isnan(self.unlike_history) else self.unlike_history,
                "novelty_frames": self.novelty_frames}


@dataclass
class FleetBaseline:
    baseline_id: str
    space: Space
    per_block: dict[str, dict[str, baseline.Baseline]]  # block -> metric -> baseline
    info: BaselineInfo
    reference_recordings: list[str]  # names (tonight) or content ids (history) of the reference recordings

    @property
    def channels(self) -> list[str]:
        return self.space.channels


@dataclass
class WindowScores:
    recording_id: str
    t_start: np.ndarray
    t_end: np.ndarray
    valid: np.ndarray
    scores: dict[str, np.ndarray]  # metric -> (n_windows,) robust z, the largest over blocks (nan where invalid)
    flagged: dict[str, np.ndarray]
    top_channels: list[str]  # per window, "ch:share,..." for the primary metric ("" where invalid)
    shares: np.ndarray | None = None  # (n_windows, n_channels) primary-metric attribution
    verdict: np.ndarray | None = None  # (n_windows,) engineer's verdict ("" where none)


@dataclass
class FleetResult:
    baseline: FleetBaseline
    windows: list[WindowScores]
    channels: list[str]
    bank: Bank
    groups: dict[str, np.ndarray] = field(default_factory=dict)  # block -> channel of each descriptor dimension
    # the space later nights take from tonight's bank: its reference frames joined by tonight's admitted frames
    history_space: Space | None = None


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


def channel_blocks(names: list[str], n_table: int, table_streams: dict[str, str] | None,
                   video_streams: list[str], per_stream: bool) -> dict[str, list[int]]:
    """Descriptor blocks over the channel positions: one per stream (table channels by the stream that reads
    them, video channels by their video stream), or one block ``"all"``."""
    if not per_stream:
        return {"all": list(range(len(names)))}
    blocks: dict[str, list[int]] = {}
    for i, name in enumerate(names):
        if i < n_table:
            b = (table_streams or {}).get(name, "tables")
        else:
            b = next(v for v in video_streams if name.startswith(f"{v}."))
        blocks.setdefault(b, []).append(i)
    return blocks


def _ridge(descriptor, samples: np.ndarray) -> float:
    return desc.baseline_ridge(samples) if descriptor.ridge == "auto" else float(descriptor.ridge)


@dataclass
class _Windows:
    """Every recording's windows in one space: per block descriptors of the valid ones, and who they are."""

    per_rec: list[tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]]  # (windows, valid, t_start, t_end)
    D: dict[str, np.ndarray]
    groups: dict[str, np.ndarray]
    owner: np.ndarray  # (N,) position of the recording in `recs`
    index: np.ndarray  # (N,) window index in its recording
    content: np.ndarray
    name: np.ndarray
    t_mid: np.ndarray


def _windows(recs, mats, valids, center, scale, blocks, ridges, windowing, descriptor, only=None) -> _Windows:
    per, parts = [], {b: [] for b in blocks}
    owner, index, t_mid = [], [], []
    groups: dict[str, np.ndarray] = {}
    for i, (r, x, v) in enumerate(zip(recs, mats, valids)):
        z = (x - center) / scale
        wins, ok, t0, t1 = recording_windows(z, v, r.t, windowing.rate_hz, windowing.window_s, windowing.hop_s)
        if only is not None and r.recording_id not in only:
            ok = np.zeros_like(ok)
        per.append((wins, ok, t0, t1))
        if not ok.any():
            continue
        for b, ix in blocks.items():
            d, g = desc.describe(wins[ok][:, :, ix], kind=descriptor.kind, include_mean=descriptor.include_mean,
                                 lags=descriptor.lags, ridge=ridges[b], shrinkage=descriptor.shrinkage)
            parts[b].append(d)
            groups[b] = g
        owner.append(np.full(int(ok.sum()), i))
        index.append(np.flatnonzero(ok))
        t_mid.append(((t0 + t1) / 2)[ok])
    if not owner:
        raise ValueError("no valid window in the batch (every window straddles a gap or is too short)")
    owner_a = np.concatenate(owner)
    return _Windows(per_rec=per, D={b: np.concatenate(p) for b, p in parts.items()}, groups=groups, owner=owner_a,
                    index=np.concatenate(index).astype(np.int64),
                    content=np.array([recs[i].identity for i in owner_a]),
                    name=np.array([recs[i].recording_id for i in owner_a]), t_mid=np.concatenate(t_mid))


def _fit_kwargs(scoring_cfg, metric: str) -> dict:
    return dict(k=scoring_cfg.k, metric=metric, stat=scoring_cfg.knn_stat, exclusion_s=scoring_cfg.exclusion_s,
                c=scoring_cfg.threshold_c, method=scoring_cfg.method, unit=scoring_cfg.knn_unit)


def fit_space(recs, base_ids, *, windowing, descriptor, scoring_cfg, pca_dims, video_gaps, table_streams=None,
              key: str = "") -> Space:
    """Fit the descriptor space on the baseline recordings, robustly: PCA of their frames, channel
    standardisation and noise floors on their samples, then (with ``trim_fraction``) the standardisation and
    floors refitted on the windows the robust batch baseline keeps, so anomalies do not inflate them."""
    base = [r for r in recs if r.recording_id in base_ids]
    pca: dict[str, dict[str, np.ndarray]] = {}
    for name, dim in pca_dims.items():
        frames = [emb for r in base for (n, _, emb) in r.videos if n == name and len(emb)]
        if not frames:
            raise ValueError(f"video stream {name!r}: no frames in the baseline recordings to fit its PCA")
        allf = np.concatenate(frames).astype(np.float64)
        pca[name] = fit_pca(allf, min(dim, allf.shape[0] - 1, allf.shape[1]))
    mats, valids, names = _channels(recs, pca, video_gaps)
    blocks = channel_blocks(names, len(recs[0].table_channels), table_streams, list(pca_dims),
                            descriptor.per_stream)
    is_base = [r.recording_id in base_ids for r in recs]
    center, scale = fit_standardiser([m for m, b in zip(mats, is_base) if b], [v for v, b in zip(valids, is_base) if b])
    z = np.concatenate([((m - center) / scale)[v] for m, v, b in zip(mats, valids, is_base) if b])
    ridges = {b: _ridge(descriptor, z[:, ix]) for b, ix in blocks.items()}
    if scoring_cfg.trim_fraction > 0:
        w = _windows(recs, mats, valids, center, scale, blocks, ridges, windowing, descriptor, only=base_ids)
        kept = np.ones(len(w.owner), bool)
        for b in blocks:  # a window is kept when no block trims it
            bl = baseline.fit_baseline(w.D[b], w.content, w.t_mid, trim_fraction=scoring_cfg.trim_fraction,
                                       **_fit_kwargs(scoring_cfg, scoring_cfg.metric))
            kept &= bl.kept
        samples = []
        for i, (wins, ok, _, _) in enumerate(w.per_rec):
            sel = kept[w.owner == i]
            if ok.any() and sel.any():
                samples.append(wins[ok][sel].reshape(-1, wins.shape[2]) * scale + center)
        if samples:
            center, scale = fit_standardiser(samples, [np.ones(len(x), bool) for x in samples])
            z = np.concatenate([(x - center) / scale for x in samples])
            ridges = {b: _ridge(descriptor, z[:, ix]) for b, ix in blocks.items()}
    else:
        w, kept = None, None
    banks = _fit_frame_banks(recs, is_base, mats, valids, w, kept, pca_dims, windowing, scoring_cfg.k)
    return Space(key=key, channels=names, center=center, scale=scale, pca=pca, blocks=blocks, ridges=ridges,
                 novelty=banks)


def _fit_frame_banks(recs, is_base, mats, valids, w, kept, pca_dims, windowing, k) -> dict[str, nov.FrameBank]:
    """Each video stream's reference frames (the baseline recordings' frames) and the robust scale of the
    novelty of the baseline's windows (those the trimming kept, when it ran), each measured against the other
    recordings' frames."""
    if w is None:
        per = [recording_windows(m, v & b, r.t, windowing.rate_hz, windowing.window_s, windowing.hop_s)
               for r, m, v, b in zip(recs, mats, valids, is_base)]
        keep = slice(None)
    else:
        per, keep = w.per_rec, kept
    base_ids = {r.recording_id for r, b in zip(recs, is_base) if b}
    banks: dict[str, nov.FrameBank] = {}
    for name in pca_dims:
        owners, times, embs = _stream_frames(recs, name, base_ids)
        if not embs:
            continue
        bank = nov.fit_frame_bank(embs, owners, times)
        bank.center, bank.scale = nov.robust_scale(_aligned(window_novelties(recs, per, bank, name, k), per)[keep])
        banks[name] = bank
    return banks


def _stream_frames(recs, name: str, only=None) -> tuple[list[str], list[np.ndarray], list[np.ndarray]]:
    """Identities, frame times and embeddings of video stream ``name`` in the recordings (those named in
    ``only`` when given) that have frames of it."""
    got = [(r.identity, t, emb) for r in recs if only is None or r.recording_id in only
           for (n, t, emb) in r.videos if n == name and len(emb)]
    return [o for o, _, _ in got], [t for _, t, _ in got], [e for _, _, e in got]


def window_novelties(recs, per_rec, bank: nov.FrameBank, name: str, k: int) -> list[np.ndarray]:
    """Per recording, the frame novelty (scoring.novelty) of every window of video stream ``name``."""
    out = []
    for r, (_, _, t0, t1) in zip(recs, per_rec):
        vid = [(t, emb) for n, t, emb in r.videos if n == name]
        if not vid or not len(vid[0][1]):
            out.append(np.full(len(t0), np.nan))
            continue
        t, emb = vid[0]
        out.append(nov.window_novelty(t, nov.frame_novelty(bank, emb, r.identity, k), t0, t1))
    return out


def _aligned(per_recording: list[np.ndarray], per_rec) -> np.ndarray:
    """Per-recording window values, in the order of the valid windows of ``_Windows`` (recordings in order,
    their valid windows in order)."""
    parts = [v[ok] for v, (_, ok, _, _) in zip(per_recording, per_rec) if ok.any()]
    return np.concatenate(parts) if parts else np.empty(0)


def _channels(recs, pca, video_gaps):
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
    return mats, valids, names


def _baseline_id(space: Space, per_block: dict[str, dict[str, baseline.Baseline]], ref_ids: list[str],
                 frame_banks: dict[str, nov.FrameBank]) -> str:
    h = hashlib.sha256(space.key.encode())
    for a in (space.center, space.scale):
        h.update(np.ascontiguousarray(a, np.float64).tobytes())
    for name in sorted(space.pca):
        for k in sorted(space.pca[name]):
            h.update(np.ascontiguousarray(space.pca[name][k], np.float64).tobytes())
    h.update(repr(sorted(space.ridges.items())).encode())
    for name in sorted(frame_banks):
        fb = frame_banks[name]
        h.update(np.ascontiguousarray(fb.frames).tobytes())
        h.update(np.array([fb.center, fb.scale], np.float64).tobytes())
    h.update("\n".join(ref_ids).encode())
    for b in sorted(per_block):
        for m in sorted(per_block[b]):
            bl = per_block[b][m]
            h.update(np.ascontiguousarray(bl.references).tobytes())
            h.update(np.float64(bl.threshold).tobytes())
    return "b-" + h.hexdigest()[:12]


def _space_for_history(space: Space, use_history: bool, recs, w: _Windows, admitted: np.ndarray) -> Space:
    """The space kept with tonight's bank: its reference frames are the earlier nights' (a history night), then
    tonight's frames, newest last, each marked admitted when it lies in a window later nights may take as a
    reference (``admitted``) -- so the frame novelty follows the history as the descriptors' references do, and a
    flagged window's frames count only once it is reviewed as normal (verdicts apply where the frames are used,
    as a review may come on any later day)."""
    if not space.novelty:
        return space
    # Per recording, the spans of its admitted windows.
    spans = {r.identity: (t0[ok][admitted[w.owner == i]], t1[ok][admitted[w.owner == i]])
             for i, (r, (_, ok, t0, t1)) in enumerate(zip(recs, w.per_rec))}
    banks = {}
    for name, ref in space.novelty.items():
        base = ref if use_history else ref.select(np.zeros(len(ref.owner), bool))
        owners, times, embs = _stream_frames(recs, name)
        adms = [((t[:, None] >= spans[o][0][None, :]) & (t[:, None] < spans[o][1][None, :])).any(axis=1)
                for o, t in zip(owners, times)]
        banks[name] = nov.extend_frame_bank(base, embs, owners, times, adms)
    return Space(key=space.key, channels=space.channels, center=space.center, scale=space.scale, pca=space.pca,
                 blocks=space.blocks, ridges=space.ridges, novelty=banks)


def _stream_z(z: dict[str, np.ndarray], space: Space) -> dict[str, np.ndarray]:
    """Per block, its z or its video stream's frame novelty z, whichever is larger: a window flagged for a new
    sight names the channels of the block that holds its camera."""
    out = {b: z[b] for b in space.blocks}
    for name in space.novelty:
        b = name if name in space.blocks else next(
            (b for b, ix in space.blocks.items() if any(space.channels[i].startswith(f"{name}.") for i in ix)), None)
        if b is not None:
            out[b] = np.fmax(out[b], z[f"{name}.novelty"])
    return out


def combine_shares(shares: dict[str, np.ndarray], z: dict[str, np.ndarray], blocks: dict[str, list[int]],
                   n_channels: int) -> np.ndarray:
    """Attribution over all channels: each block's shares weighted by its squared positive z (the blocks that
    deviate most own the deviation); equal block weights where no block deviates."""
    names = list(blocks)
    Z = np.stack([np.nan_to_num(np.maximum(z[b], 0.0)) for b in names], axis=1) ** 2
    tot = Z.sum(axis=1, keepdims=True)
    Wt = np.where(tot > 0, Z / np.where(tot > 0, tot, 1.0), 1.0 / len(names))
    out = np.zeros((len(Z), n_channels))
    for j, b in enumerate(names):
        out[:, blocks[b]] = Wt[:, j:j + 1] * shares[b]
    return out


def score_fleet(recs: list[RecordingFeatures], *, windowing, descriptor, scoring_cfg, baseline_cfg=BaselineSpec(),
                pca_dims: dict[str, int], video_gaps: dict[str, float], table_streams: dict[str, str] | None = None,
                space_key: str = "", parent_space: Space | None = None, history: list[Bank] | tuple = (),
                reviews: Reviews | None = None, metrics=METRICS) -> FleetResult:
    """Score every window of the batch against the fleet's baseline.

    The references (``baseline_cfg.source``): ``history`` -- earlier nights' admitted windows (``history``, newest
    first, in ``parent_space``), joined by tonight's batch while they hold fewer than k recordings; with no
    usable history (a first night, or a profile change that makes ``space_key`` differ from the parent's) the
    night is scored as ``batch``: tonight's windows, robustly trimmed. ``recordings``: the listed recordings'
    windows, robustly trimmed. Tonight's own windows never serve as references under ``history``, so a fault
    recurring tonight is measured against normal operation of earlier nights.
    """
    if not recs:
        raise ValueError("no recordings to score")
    source = baseline_cfg.source
    if source == "recordings":
        base_ids = set(baseline_cfg.recordings)
        if not base_ids & {r.recording_id for r in recs}:
            raise ValueError(f"none of the baseline recordings {sorted(base_ids)} is in this batch")
    else:
        base_ids = {r.recording_id for r in recs}
    use_history = (source == "history" and parent_space is not None and parent_space.key == space_key
                   and len(history) > 0)
    space = parent_space if use_history else fit_space(
        recs, base_ids, windowing=windowing, descriptor=descriptor, scoring_cfg=scoring_cfg, pca_dims=pca_dims,
        video_gaps=video_gaps, table_streams=table_streams, key=space_key)
    mats, valids, names = _channels(recs, space.pca, video_gaps)
    if names != space.channels:
        raise ValueError(f"channels {names} differ from the baseline's {space.channels}")
    w = _windows(recs, mats, valids, space.center, space.scale, space.blocks, space.ridges, windowing, descriptor)
    frame_banks: dict[str, nov.FrameBank] = {}

    def novelty_z(with_tonight: bool) -> dict[str, np.ndarray]:
        """Each camera's frame novelty z, the same under every metric: against the space's reference frames
        (the admitted ones and those of windows reviewed as normal, never a reviewed fault's), joined by
        tonight's baseline recordings' frames when tonight's batch joins a history's references."""
        out = {}
        for name, bank in space.novelty.items():
            bank = bank.references(verdicts_for(bank.owner, bank.t, reviews, 0.5 * windowing.window_s))
            if with_tonight and use_history:
                owners, times, embs = _stream_frames(recs, name, base_ids)
                bank = nov.extend_frame_bank(bank, embs, owners, times)
            frame_banks[name] = bank
            vals = _aligned(window_novelties(recs, w.per_rec, bank, name, int(scoring_cfg.k)), w.per_rec)
            out[f"{name}.novelty"] = nov.zscore(vals, bank)
        return out

    tol = 0.5 * windowing.hop_s
    verdict = verdicts_for(w.content, w.t_mid, reviews, tol)
    in_base = np.isin(w.name, list(base_ids))
    k = int(scoring_cfg.k)
    primary = scoring_cfg.metric

    refs: References | None = assemble(list(history), reviews, max_references=baseline_cfg.max_references,
                                       tolerance_s=tol) if use_history else None
    tonight = refs is None or refs.n_recordings < k
    if refs is not None and len(refs) < 2:
        refs = None
    tonight_ok = verdict == "normal"
    if refs is not None:  # a window approved on an earlier night and scored again tonight counts once
        tonight_ok &= np.array([(c_, t_) not in refs.approved_ids for c_, t_ in
                                zip(w.content.tolist(), np.round(w.t_mid, 6).tolist())], bool)

    known = set() if refs is None else set(zip(refs.content.tolist(), np.round(refs.t_mid, 6).tolist()))

    def fit(with_tonight: bool) -> dict[str, dict[str, baseline.Baseline]]:
        per_block: dict[str, dict[str, baseline.Baseline]] = {}
        for b in space.blocks:
            approved = w.D[b][tonight_ok]
            if refs is not None and len(refs.approved[b]):
                approved = np.concatenate([refs.approved[b], approved])
            per_block[b] = {}
            for m in metrics:
                kw = _fit_kwargs(scoring_cfg, m)
                if with_tonight:
                    bl = baseline.fit_baseline(w.D[b][in_base], w.content[in_base], w.t_mid[in_base],
                                               trim_fraction=scoring_cfg.trim_fraction,
                                               max_refs=baseline_cfg.max_references, **kw)
                    if refs is not None:  # a thin history, or one unlike tonight: tonight's references join
                        new = np.array([(c_, t_) not in known for c_, t_ in
                                        zip(bl.ref_rec_ids.tolist(), np.round(bl.ref_times, 6).tolist())], bool)
                        bl = baseline.fit_references(np.concatenate([refs.descriptors[b], bl.references[new]]),
                                                     np.concatenate([refs.content, bl.ref_rec_ids[new]]),
                                                     np.concatenate([refs.t_mid, bl.ref_times[new]]), **kw)
                else:
                    bl = baseline.fit_references(refs.descriptors[b], refs.content, refs.t_mid, **kw)
                bl.approved = approved if len(approved) else None
                per_block[b][m] = bl
        return per_block

    def scores(per_block, z_novelty):
        z_by = {m: {**{b: baseline.zscore(baseline.raw_scores(w.D[b], w.content, w.t_mid, per_block[b][m]),
                                          per_block[b][m]) for b in space.blocks}, **z_novelty} for m in metrics}
        with warnings.catch_warnings():  # a window no block can score stays NaN
            warnings.simplefilter("ignore", RuntimeWarning)
            return z_by, {m: np.nanmax(np.stack(list(z_by[m].values())), axis=0) for m in metrics}

    per_block = fit(tonight)
    z_by, z = scores(per_block, novelty_z(tonight))
    c = float(scoring_cfg.threshold_c)
    unlike_history = float("nan")
    if not tonight:
        # A fault is the exception in a night, not its rule: when most of tonight is unlike every earlier night,
        # the history shows other operation (a new site, a new season), and tonight's own robust batch joins it.
        zp = z[primary][np.isfinite(z[primary])]
        unlike_history = float(np.mean(zp > c)) if len(zp) else 0.0
        if unlike_history > UNLIKE_HISTORY_MAX:
            tonight = True
            per_block = fit(True)
            z_by, z = scores(per_block, novelty_z(True))
    # An engineer's verdict on a window decides its flag: a reviewed false alarm is not flagged again.
    flagged = {m: np.where(verdict == "normal", False, np.where(verdict == "fault", True, z[m] > c)) for m in metrics}
    shares_b = {b: baseline.attribute(w.D[b], per_block[b][primary].mean, w.groups[b], len(ix))
                for b, ix in space.blocks.items()}
    shares = combine_shares(shares_b, _stream_z(z_by[primary], space), space.blocks, len(names))
    # Only confidently normal windows teach later nights what normal is: a fault that scored just below the
    # threshold tonight (partly masked in a first night's batch) must not become the references that hide it
    # next week; nor may the edges of a flagged event (the guard band, one window length).
    admitted = ~guard_band(flagged[primary], w.content, w.t_mid, windowing.window_s)
    admitted &= z[primary] <= float(baseline_cfg.history_max_score)
    admitted = np.where(verdict == "normal", True, np.where(verdict == "fault", False, admitted))
    bank = Bank(content=w.content, recording_id=w.name, window_index=w.index, t_mid=w.t_mid, admitted=admitted,
                descriptors=w.D)
    history_space = _space_for_history(space, use_history, recs, w, admitted)

    if tonight:
        ref_recs = sorted(set(w.name[in_base]))
    else:
        ref_recs = sorted(set(refs.content))
    any_bl = per_block[next(iter(space.blocks))][primary]
    info = BaselineInfo(source="history" if refs is not None else ("recordings" if source == "recordings" else "batch"),
                        n_references=len(any_bl.references), n_reference_recordings=len(set(any_bl.ref_rec_ids)),
                        reference_runs=refs.runs if refs is not None else [], tonight=tonight,
                        n_approved=0 if any_bl.approved is None else len(any_bl.approved),
                        space_fitted=not use_history, ridges=dict(space.ridges), k=k,
                        unlike_history=unlike_history,
                        novelty_frames={n: [len(fb.owner), len(set(fb.owner.tolist()))]
                                        for n, fb in frame_banks.items()})
    ref_ids = [] if refs is None else [f"{c_}:{t_:.6f}" for c_, t_ in zip(refs.content, refs.t_mid)]
    fb = FleetBaseline(baseline_id=_baseline_id(space, per_block, ref_ids, frame_banks), space=space,
                       per_block=per_block, info=info, reference_recordings=ref_recs)

    out: list[WindowScores] = []
    for i, (r, (wins, ok, t0, t1)) in enumerate(zip(recs, w.per_rec)):
        nw = len(t0)
        sel = w.owner == i
        sc, fl = {}, {}
        for m in metrics:
            s = np.full(nw, np.nan)
            s[ok] = z[m][sel]
            sc[m] = s
            f = np.zeros(nw, bool)
            f[ok] = flagged[m][sel]
            fl[m] = f
        sh = np.full((nw, len(names)), np.nan)
        sh[ok] = shares[sel]
        vd = np.full(nw, "", dtype=object)
        vd[ok] = verdict[sel]
        tops = []
        for j in range(nw):
            if not ok[j]:
                tops.append("")
                continue
            order = np.argsort(-sh[j])[: scoring_cfg.n_top_channels]
            tops.append(",".join(f"{names[c_]}:{sh[j, c_]:.3f}" for c_ in order))
        out.append(WindowScores(recording_id=r.recording_id, t_start=t0, t_end=t1, valid=ok, scores=sc, flagged=fl,
                                top_channels=tops, shares=sh, verdict=vd.astype(str)))
    return FleetResult(baseline=fb, windows=out, channels=names, bank=bank, groups=w.groups,
                       history_space=history_space)

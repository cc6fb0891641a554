"""Frame novelty of a video stream: how far each frame is from what k other recordings of the fleet have shown.

A window's camera descriptor (mean and covariance of a few principal components over seconds) follows where the
vehicle is and how the view moves; it cannot tell a small object that was never in the aisle (a pallet, a
person at the edge of the image) from ordinary variation. Each frame's embedding can: matched against the nearest
frame of every other reference recording, a sight that k recordings show is close, a new one is not. The score
uses the same rule as the windows' neighbours in recordings (``knn_unit = "recording"``): a sight is normal only
where k other recordings show it, so a fault recurring in fewer than k recordings stays novel.

Distances are cosine distances between embeddings centred on the baseline's frame mean (the usual similarity of
CNN global descriptors, e.g. Babenko et al. 2014, "Neural codes for image retrieval"), computed on the unit
vectors projected onto their leading principal directions (``FRAME_DIM``) so that the reference frames kept with
the descriptor space stay small. Pure numpy; no Prefect.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from fleetsift.scoring import baseline

FRAME_DIM = 64  # principal directions of the unit embeddings kept per reference frame
MAX_FRAMES = 20000  # frames kept per video stream: a first night evenly subsampled, later nights the newest
_CHUNK = 1024  # query frames per distance block (bounds memory at _CHUNK x n_reference_frames floats)


@dataclass
class FrameBank:
    """One video stream's reference frames and the robust scale of its window novelty."""

    mean: np.ndarray  # (d,) embedding centre
    basis: np.ndarray  # (D, d) principal directions of the centred unit embeddings
    frames: np.ndarray  # (B, D) float16 projected unit embeddings of the reference frames
    owner: np.ndarray  # (B,) identity (content hash) of each reference frame's recording
    t: np.ndarray  # (B,) each reference frame's time, seconds on its recording's common clock
    # (B,) whether the frame may be a reference: false for frames of a flagged window, kept so that a later
    # review of that window as normal can still bring them in
    admitted: np.ndarray
    center: float = 0.0  # median of the reference windows' novelty
    scale: float = 1.0  # 1.4826 x MAD of the reference windows' novelty

    def to_arrays(self, prefix: str) -> dict[str, np.ndarray]:
        return {f"{prefix}.mean": self.mean, f"{prefix}.basis": self.basis, f"{prefix}.frames": self.frames,
                f"{prefix}.owner": self.owner.astype(str), f"{prefix}.t": self.t.astype(np.float64),
                f"{prefix}.admitted": self.admitted.astype(bool),
                f"{prefix}.robust": np.array([self.center, self.scale], np.float64)}

    @classmethod
    def from_arrays(cls, a: dict[str, np.ndarray], prefix: str) -> "FrameBank":
        c, s = (float(x) for x in a[f"{prefix}.robust"])
        return cls(mean=a[f"{prefix}.mean"], basis=a[f"{prefix}.basis"], frames=a[f"{prefix}.frames"],
                   owner=a[f"{prefix}.owner"].astype(str), t=a[f"{prefix}.t"].astype(np.float64),
                   admitted=a[f"{prefix}.admitted"].astype(bool), center=c, scale=s)

    def select(self, keep: np.ndarray) -> "FrameBank":
        return FrameBank(mean=self.mean, basis=self.basis, frames=self.frames[keep], owner=self.owner[keep],
                         t=self.t[keep], admitted=self.admitted[keep], center=self.center, scale=self.scale)

    def references(self, verdicts: np.ndarray) -> "FrameBank":
        """The frames that count as references given each frame's review verdict ("" where none): the admitted
        ones and those reviewed as normal, never one reviewed as a fault."""
        v = np.asarray(verdicts).astype(str)
        return self.select((self.admitted | (v == "normal")) & (v != "fault"))


def _unit(emb: np.ndarray, mean: np.ndarray) -> np.ndarray:
    x = np.asarray(emb, np.float64) - mean
    return x / np.maximum(np.linalg.norm(x, axis=1, keepdims=True), 1e-12)


def fit_frame_bank(embeddings: list[np.ndarray], owners: list[str], times: list[np.ndarray] | None = None,
                   dim: int = FRAME_DIM, max_frames: int = MAX_FRAMES) -> FrameBank:
    """Reference frames from the baseline recordings' embeddings (one array per recording, its identity beside):
    at most ``max_frames``, evenly subsampled, and the principal directions fitted on those (the covariance of
    the unit vectors, eigendecomposed: cheap for any number of frames, as the embedding size bounds it)."""
    allf = np.concatenate([np.asarray(e) for e in embeddings])
    owner = np.concatenate([np.full(len(e), o, dtype=object) for e, o in zip(embeddings, owners)]).astype(str)
    t = np.concatenate([np.asarray(x, np.float64) for x in times] if times is not None
                       else [np.arange(len(e), dtype=np.float64) for e in embeddings])
    mean = allf.mean(axis=0, dtype=np.float64)
    keep = np.unique(np.linspace(0, len(allf) - 1, min(len(allf), max_frames)).round().astype(int))
    u = _unit(allf[keep], mean)
    uc = u - u.mean(axis=0)
    n_dir = max(1, min(int(dim), len(u) - 1, u.shape[1]))
    _, vecs = np.linalg.eigh(uc.T @ uc)  # ascending eigenvalues
    basis = np.ascontiguousarray(vecs[:, ::-1][:, :n_dir].T)
    return FrameBank(mean=mean, basis=basis, frames=(u @ basis.T).astype(np.float16), owner=owner[keep], t=t[keep],
                     admitted=np.ones(len(keep), bool))


def frame_novelty(bank: FrameBank, emb: np.ndarray, identity: str, k: int) -> np.ndarray:
    """Per frame of one recording: the cosine distance to the nearest reference frame of each other reference
    recording, the k-th smallest of those (the largest there is when fewer than k other recordings are in the
    bank; NaN when none is)."""
    emb = np.asarray(emb)
    out = np.full(len(emb), np.nan)
    others = bank.owner != identity
    if not len(emb) or not others.any():
        return out
    ref_owner = bank.owner[others]
    order = np.argsort(ref_owner, kind="stable")
    ref = bank.frames[others][order].astype(np.float32)
    _, starts = np.unique(ref_owner[order], return_index=True)
    kk = min(int(k), len(starts)) - 1
    q = (_unit(emb, bank.mean) @ bank.basis.T).astype(np.float32)
    rr = (ref * ref).sum(axis=1)
    for a in range(0, len(q), _CHUNK):
        qa = q[a:a + _CHUNK]
        d2 = np.maximum((qa * qa).sum(axis=1)[:, None] + rr[None, :] - 2.0 * (qa @ ref.T), 0.0)
        per_rec = np.minimum.reduceat(d2, starts, axis=1)  # (n, recordings): nearest frame of each
        out[a:a + _CHUNK] = np.partition(per_rec, kk, axis=1)[:, kk] / 2.0  # |u - v|^2 / 2 = 1 - cos
    return out


def window_novelty(t_frames: np.ndarray, novelty: np.ndarray, t_start: np.ndarray, t_end: np.ndarray
                   ) -> np.ndarray:
    """Per window [t_start, t_end): the mean novelty of its frames (NaN for a window without a frame)."""
    t_frames = np.asarray(t_frames, np.float64)
    ok = np.isfinite(novelty)
    t_frames, novelty = t_frames[ok], novelty[ok]
    order = np.argsort(t_frames, kind="stable")
    t_frames, novelty = t_frames[order], novelty[order]
    c = np.concatenate([[0.0], np.cumsum(novelty)])
    lo = np.searchsorted(t_frames, t_start, side="left")
    hi = np.searchsorted(t_frames, t_end, side="left")
    n = hi - lo
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(n > 0, (c[hi] - c[lo]) / np.maximum(n, 1), np.nan)


def robust_scale(values: np.ndarray) -> tuple[float, float]:
    """Median and robust sigma of the finite values, as for the descriptor blocks' z (baseline.robust_scale);
    (0, 1) when there are none (no baseline recording with another to compare its frames with)."""
    v = np.asarray(values, np.float64)
    if not np.isfinite(v).any():
        return 0.0, 1.0
    med, s = baseline.robust_scale(v)
    return med, max(s, 1e-12)


def zscore(values: np.ndarray, bank: FrameBank) -> np.ndarray:
    return (np.asarray(values, np.float64) - bank.center) / bank.scale


def extend_frame_bank(bank: FrameBank, embeddings: list[np.ndarray], owners: list[str],
                      times: list[np.ndarray], admitted: list[np.ndarray] | None = None,
                      max_frames: int = MAX_FRAMES) -> FrameBank:
    """The bank joined by more recordings' frames, projected in the bank's own basis, newest last (``admitted``:
    per recording, which of its frames may be references; all by default). A recording already in the bank is
    replaced by its newer frames, as a recording scored again counts as its newest night saw it; the robust scale
    stays the bank's. Over ``max_frames`` the oldest frames go, so the reference frames follow the history."""
    adm = admitted if admitted is not None else [np.ones(len(e), bool) for e in embeddings]
    new = [(o, e, t, a) for e, o, t, a in zip(embeddings, owners, times, adm) if len(e)]
    if not new:
        return bank
    old = bank.select(~np.isin(bank.owner, [o for o, _, _, _ in new]))
    frames = np.concatenate([old.frames] + [(_unit(e, bank.mean) @ bank.basis.T).astype(np.float16)
                                            for _, e, _, _ in new])
    owner = np.concatenate([old.owner] + [np.full(len(e), o, dtype=object).astype(str) for o, e, _, _ in new])
    t = np.concatenate([old.t] + [np.asarray(t, np.float64) for _, _, t, _ in new])
    ok = np.concatenate([old.admitted] + [np.asarray(a, bool) for _, _, _, a in new])
    return FrameBank(mean=bank.mean, basis=bank.basis, frames=frames[-max_frames:], owner=owner[-max_frames:],
                     t=t[-max_frames:], admitted=ok[-max_frames:], center=bank.center, scale=bank.scale)

"""The fleet's memory of normal operation: each night's described windows (a bank), engineers' verdicts, and
the reference set a later night is scored against.

Pure numpy (no Prefect, no store access): the score stage loads the banks and reviews from the store and hands
them here. A bank holds every valid window of one night in one descriptor space (the baseline's channel
standardisation, video PCA and noise floor), so banks of nights that share a space compare directly.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from fleetsift.errors import InputError
from fleetsift.vocabulary import VERDICTS

__all__ = ["VERDICTS", "Bank", "Reviews", "References", "guard_band", "verdicts_for", "assemble"]

_SRC = "fleetsift.scoring.history"


@dataclass
class Bank:
    """One night's valid windows in one descriptor space.

    ``content`` is each window's recording identity across nights (the recording's content hash, so a recording
    scored again on a later night is the same recording), ``admitted`` whether the night's scores let it join
    later nights' references (not flagged and outside the guard band of a flagged window).
    """

    content: np.ndarray  # (n,) str
    recording_id: np.ndarray  # (n,) str, the recording's name that night
    window_index: np.ndarray  # (n,) int
    t_mid: np.ndarray  # (n,) float, window centre, seconds from the recording's first sample
    admitted: np.ndarray  # (n,) bool
    descriptors: dict[str, np.ndarray]  # block name -> (n, d, d)
    run_id: str = ""

    def __len__(self) -> int:
        return len(self.content)

    def to_arrays(self) -> dict[str, np.ndarray]:
        out = {"bank.content": self.content.astype(str), "bank.recording_id": self.recording_id.astype(str),
               "bank.window_index": self.window_index.astype(np.int64), "bank.t_mid": self.t_mid.astype(np.float64),
               "bank.admitted": self.admitted.astype(bool)}
        out.update({f"bank.desc.{b}": d for b, d in self.descriptors.items()})
        return out

    @classmethod
    def from_arrays(cls, a: dict[str, np.ndarray], run_id: str = "") -> "Bank":
        blocks = {k[len("bank.desc."):]: v for k, v in a.items() if k.startswith("bank.desc.")}
        return cls(content=a["bank.content"].astype(str), recording_id=a["bank.recording_id"].astype(str),
                   window_index=a["bank.window_index"].astype(np.int64), t_mid=a["bank.t_mid"].astype(np.float64),
                   admitted=a["bank.admitted"].astype(bool), descriptors=blocks, run_id=run_id)


@dataclass
class Reviews:
    """Engineers' verdicts, the latest per window (or whole recording), matched to windows by recording content
    and window centre."""

    content: np.ndarray = field(default_factory=lambda: np.zeros(0, str))
    t_mid: np.ndarray = field(default_factory=lambda: np.zeros(0))  # NaN for a whole-recording verdict
    verdict: np.ndarray = field(default_factory=lambda: np.zeros(0, str))

    def __len__(self) -> int:
        return len(self.content)

    def __post_init__(self):
        bad = sorted(set(np.asarray(self.verdict).astype(str)) - set(VERDICTS))
        if bad:
            raise InputError(_SRC, "verdict", f"one of {VERDICTS}", bad)


def verdicts_for(content, t_mid, reviews: Reviews | None, tolerance_s: float) -> np.ndarray:
    """The verdict on each window (``""`` where none): a window verdict applies to the window of that recording
    whose centre lies within ``tolerance_s`` of the reviewed centre; a recording verdict to all its windows. A
    window verdict overrides a recording verdict (reviews arrive newest-last; the caller keeps the latest)."""
    content = np.asarray(content).astype(str)
    t_mid = np.asarray(t_mid, dtype=np.float64)
    out = np.full(len(content), "", dtype=object)
    if reviews is None or len(reviews) == 0 or len(content) == 0:
        return out.astype(str)
    rc, rt, rv = reviews.content.astype(str), reviews.t_mid.astype(np.float64), reviews.verdict.astype(str)
    whole = np.isnan(rt)
    for c, v in zip(rc[whole], rv[whole]):
        out[content == c] = v
    if (~whole).any():
        same = content[:, None] == rc[~whole][None, :]
        near = np.abs(t_mid[:, None] - rt[~whole][None, :]) <= tolerance_s
        hit = same & near
        # The last matching review (the newest) wins.
        last = hit.shape[1] - 1 - np.argmax(hit[:, ::-1], axis=1)
        has = hit.any(axis=1)
        out[has] = rv[~whole][last[has]]
    return out.astype(str)


def guard_band(flagged, content, t_mid, span_s: float) -> np.ndarray:
    """Flagged windows and every window of the same recording whose centre lies within ``span_s`` of a flagged
    one: the edges of an event score lower than its middle and must not teach the baseline that the event is
    normal (a guard band around detections, common practice)."""
    flagged = np.asarray(flagged, bool)
    content = np.asarray(content).astype(str)
    t = np.asarray(t_mid, dtype=np.float64)
    out = flagged.copy()
    if not flagged.any():
        return out
    near = (content[:, None] == content[flagged][None, :]) & (np.abs(t[:, None] - t[flagged][None, :]) <= span_s)
    return out | near.any(axis=1)


@dataclass
class References:
    """The windows a night is scored against, per descriptor block, with where they came from."""

    descriptors: dict[str, np.ndarray]
    content: np.ndarray
    t_mid: np.ndarray
    run_id: np.ndarray
    approved: dict[str, np.ndarray]  # block -> (a, d, d): windows reviewed as normal
    n_candidates: int = 0  # admitted windows before the cap
    approved_ids: set = field(default_factory=set)  # (content, rounded window centre) of the approved windows

    def __len__(self) -> int:
        return len(self.content)

    @property
    def runs(self) -> list[str]:
        return sorted(set(self.run_id.astype(str)))

    @property
    def n_recordings(self) -> int:
        return len(set(self.content.astype(str)))


def assemble(banks: list[Bank], reviews: Reviews | None, *, max_references: int, tolerance_s: float) -> References:
    """The references of a night from earlier nights' banks (newest first, one descriptor space).

    A window joins when its night admitted it and no engineer marked it a fault, or when an engineer marked it
    normal. A window present in several banks (a recording scored again on a later night) counts once, as the
    *first* night that scored it judged it: that judgement stands (a verdict can change it), so an unchanged inbox
    gives the same references night after night and its scores are reused from the cache. Above
    ``max_references`` windows, an evenly spaced subset in (night, recording, time) order is kept, so every night
    and recording stays represented in proportion.
    """
    if not banks:
        raise InputError(_SRC, "banks", "at least one earlier night", "none")
    blocks = list(banks[0].descriptors)
    seen: set[tuple[str, int]] = set()
    fresh_of = {}
    for bank in reversed(banks):  # oldest first: the first night to score a window decides for it
        if list(bank.descriptors) != blocks:
            raise InputError(_SRC, "banks", f"descriptor blocks {blocks}", list(bank.descriptors))
        keys = list(zip(bank.content.tolist(), bank.window_index.tolist()))
        fresh_of[id(bank)] = np.array([k not in seen for k in keys], bool)
        seen.update(keys)
    parts, approved = [], {b: [] for b in blocks}
    approved_ids: set = set()
    for bank in banks:
        fresh = fresh_of[id(bank)]
        v = verdicts_for(bank.content, bank.t_mid, reviews, tolerance_s)
        take = fresh & ((bank.admitted & (v != "fault")) | (v == "normal"))
        ok = fresh & (v == "normal")
        for b in blocks:
            approved[b].append(bank.descriptors[b][ok])
        approved_ids.update(zip(bank.content[ok].tolist(), np.round(bank.t_mid[ok], 6).tolist()))
        order = np.lexsort((bank.t_mid[take], bank.content[take]))
        parts.append((bank, np.flatnonzero(take)[order]))
    n = sum(len(ix) for _, ix in parts)
    keep = np.ones(n, bool)
    if n > int(max_references):
        keep[:] = False
        keep[np.unique(np.linspace(0, n - 1, int(max_references)).round().astype(int))] = True
    desc = {b: [] for b in blocks}
    content, t_mid, run_id = [], [], []
    pos = 0
    for bank, ix in parts:
        sel = ix[keep[pos:pos + len(ix)]]
        pos += len(ix)
        for b in blocks:
            desc[b].append(bank.descriptors[b][sel])
        content.append(bank.content[sel])
        t_mid.append(bank.t_mid[sel])
        run_id.append(np.full(len(sel), bank.run_id, dtype=object))
    d0 = banks[0].descriptors
    return References(
        descriptors={b: np.concatenate(desc[b]) if desc[b] else np.zeros((0,) + d0[b].shape[1:]) for b in blocks},
        content=np.concatenate(content).astype(str), t_mid=np.concatenate(t_mid).astype(np.float64),
        run_id=np.concatenate(run_id).astype(str),
        approved={b: np.concatenate(approved[b]) for b in blocks}, n_candidates=n, approved_ids=approved_ids)

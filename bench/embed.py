"""Throughput of the EfficientNet-Lite0 frame embedder, side by side in one run:
  1. batch size x threads x channels_last (torch float32);
  2. runtime x precision: torch float32, ONNX Runtime float32, ONNX Runtime int8 (static QDQ, per-channel
     weights, calibrated on 16 demo frames), images/s and per-frame cosine to torch float32 on other demo frames
     and scikit-image's photos (the accuracy guard: >= 0.98);
  3. frame skipping on the bundled demo fleet (sample_raw, 5 Hz): share of frames skipped and the lowest
     per-frame cosine to embedding every frame, per skip_threshold.

Run: .venv/bin/python bench/embed.py [--rounds 3] [--min-seconds 1.0] [--skip-only]
Configurations are interleaved round by round (the machine is shared, load drifts) and the median over rounds
is reported, with ratios computed inside this one run.
"""

from __future__ import annotations

import argparse
import itertools
import os
import statistics
import sys
import time

import tempfile
from pathlib import Path

import numpy as np
import torch

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))
from fleetsift.featurizers import embed as E  # noqa: E402
from fleetsift.featurizers import video, weights  # noqa: E402
from fleetsift.featurizers.embed import load_backbone  # noqa: E402
from fleetsift.profile import VideoStream  # noqa: E402

THRESHOLDS = (0.004, 0.006, 0.008, 0.01, 0.015, 0.02)


def demo_frames(n_per: int | None = None) -> list[tuple[np.ndarray, np.ndarray]]:
    """(times, frames) of each bundled demo recording's camera, sampled at 5 Hz."""
    out = []
    for p in sorted((ROOT / "sample_raw").glob("*/camera.mp4")):
        fr = list(video.iter_frames(p, 5.0))[:n_per]
        out.append((np.array([t for t, _ in fr]), np.stack([f for _, f in fr])))
    return out


def embed_all(bb, frames: np.ndarray, batch: int = 16) -> np.ndarray:
    return np.concatenate([bb(frames[i:i + batch]) for i in range(0, len(frames), batch)])


def cosine(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    return E._cosine(a, b)


def skip_sweep(bb) -> None:
    """Share skipped and lowest cosine per threshold: the frame-skip rule of embed_frames replayed on the
    demo fleet's frames, each frame embedded once (the reference)."""
    data = [(t, f, embed_all(bb, f)) for t, f in demo_frames()]
    print(f"\nframe skipping on the demo fleet ({sum(len(t) for t, _, _ in data)} frames at 5 Hz, "
          f"{len(data)} recordings); default skip_threshold {VideoStream.skip_threshold}")
    print(f"{'threshold':>9} {'skipped':>8} {'min cosine':>10} {'guard':>6}")
    for thr in THRESHOLDS:
        n = total = 0
        low = 1.0
        for t, f, ref in data:
            got = np.empty_like(ref)
            thumbs = [E.thumbnail(x) for x in f]
            last = 0
            for i in range(len(f)):
                if i and t[i] - t[i - 1] <= 2.0 / 5.0 and E.frame_difference(thumbs[i], thumbs[last]) < thr:
                    n += 1
                else:
                    last = i
                got[i] = ref[last]
            low = min(low, float(cosine(got, ref).min()))
            total += len(f)
        print(f"{thr:>9g} {n / total:>8.1%} {low:>10.4f} {'ok' if low >= E.INT8_MIN_COSINE else 'FAIL':>6}")


def demo_accuracy(work: Path, skip_threshold: float | None = None) -> None:
    """The guard at fleet level: the bundled demo night scored with plain float32 torch embedding every sampled
    frame, and with the default profile (ONNX Runtime float32, frames skipped): ROC AUC per metric, and the
    scores of windows inside the planted visual anomalies (pallet, person), both in one run."""
    import shutil

    from fleetsift.flows import night
    from fleetsift.flows.evaluate import evaluate_store
    from fleetsift.scoring.evaluation import read_labels
    from fleetsift.store import Store
    from fleetsift.tasks import stages

    plain = night.Steps(tables=stages.run_tables, embed=stages.run_embed, score=stages.run_score,
                        write=stages.run_write)
    inbox = work / "demo-inbox"
    shutil.copytree(ROOT / "sample_raw", inbox, ignore=shutil.ignore_patterns("*.py", "README.md"))
    labels = read_labels(str(inbox / "labels.csv"))
    visual = labels[labels["kind"].isin(["pallet", "person"])]
    # One model thread for both: the outputs do not depend on it, and on a shared machine two threads can run
    # several times slower (the first table of this benchmark).
    text = (inbox / "profile.toml").read_text().replace("threads = 2", "threads = 1")
    variants = {"torch float32, every frame": text.replace('runtime = "onnxruntime"', 'runtime = "torch"')
                .replace("skip_threshold = 0.006", "skip_threshold = 0.0"),
                "default (onnxruntime float32, skip)": text if skip_threshold is None else
                text.replace("skip_threshold = 0.006", f"skip_threshold = {skip_threshold}")}
    assert variants["torch float32, every frame"] != text, "sample_raw/profile.toml no longer names the keys"
    res = {}
    for name, prof_text in variants.items():
        prof = work / f"{len(res)}.toml"
        prof.write_text(prof_text)
        store = work / f"store-{len(res)}"
        t0 = time.perf_counter()
        out = night.run_night(plain, inbox=str(inbox), store=str(store), profile_path=str(prof), progress=False)
        ev = evaluate_store(str(store), out["run_id"], str(inbox / "labels.csv"), comparison=False)
        w = Store(store).read("windows")
        w = w[w["metric"] == "riemann"]
        mid = (w["t_start_s"] + w["t_end_s"]) / 2
        inside = np.zeros(len(w), bool)
        for r in visual.itertuples():
            inside |= ((w["recording_id"] == r.recording_id).to_numpy() & (mid >= r.t_start_s).to_numpy()
                       & (mid <= r.t_end_s).to_numpy())
        res[name] = {"auc": ev["auc"], "visual": w[inside].set_index(["recording_id", "window_index"])["score"],
                     "seconds": time.perf_counter() - t0, "frames": out["embed_frames"]}
    (ref_name, ref), (new_name, new) = res.items()
    print("\ndemo fleet (sample_raw, one night), accuracy of the default embedding path against plain float32")
    for name, r in res.items():
        fr = r["frames"]
        print(f"  {name:<38} AUC riemann {r['auc']['riemann']:.4f} logeuclid {r['auc']['logeuclid']:.4f} "
              f"euclid {r['auc']['euclid']:.4f}; {fr['frames_skipped']} of {fr['frames']} frames skipped; "
              f"{r['seconds']:.0f} s")
    for m in ("riemann", "logeuclid", "euclid"):
        print(f"  AUC difference {m}: {new['auc'][m] - ref['auc'][m]:+.4f} (guard: within 0.005 / 0.01)")
    a, b = ref["visual"].align(new["visual"], join="inner")
    rel = np.abs(b - a) / np.abs(a).clip(lower=1e-9)
    print(f"  windows inside planted visual anomalies ({len(a)}): score change median {np.median(rel):.2%}, "
          f"largest {rel.max():.2%} (guard: 2 %); the largest: {rel.idxmax()} score {a[rel.idxmax()]:.3f} -> "
          f"{b[rel.idxmax()]:.3f}")


def runtimes(rounds: int, min_seconds: float):
    import skimage.data

    work = Path(tempfile.mkdtemp(prefix="fleetsift-bench-onnx-"))
    fp = weights.backbone_fingerprint()
    demo = demo_frames(40)
    calib = np.concatenate([f[:4] for _, f in demo[:4]])  # 16 frames of 4 recordings, as the stage calibrates
    test = np.concatenate([f[20:40:4] for _, f in demo[4:]])
    photos = [skimage.data.chelsea(), skimage.data.coffee(), skimage.data.astronaut(), skimage.data.rocket()]
    bbs = {("torch", "float32"): load_backbone(threads=2)}
    ort32 = load_backbone(threads=2)
    graph = ort32.use_onnxruntime(work, fp, "float32")
    bbs[("onnxruntime", "float32")] = ort32
    q = load_backbone(threads=2)
    qgraph = work / "int8.onnx"
    E._quantize_int8(graph, qgraph, q.preprocess(calib).contiguous().numpy())
    q._session, q.runtime, q.precision = E._ort_session(qgraph, 2), "onnxruntime", "int8"  # guard bypassed
    bbs[("onnxruntime", "int8")] = q
    ref_t = embed_all(bbs[("torch", "float32")], test)
    ref_p = [bbs[("torch", "float32")](p[None]) for p in photos]
    frames224 = np.random.default_rng(0).integers(0, 256, size=(32, 224, 224, 3), dtype=np.uint8)
    res: dict = {k: [] for k in bbs}
    for _ in range(rounds):
        for k, bb in bbs.items():
            res[k].append(rate(bb, frames224, 2, min_seconds))
    med = {k: statistics.median(v) for k, v in res.items()}
    base = med[("torch", "float32")]
    print("\nruntime x precision (224 px, batch 32, 2 threads; cosine to torch float32 per frame, lowest)")
    print(f"{'runtime':>12} {'precision':>9} {'img/s':>7} {'ratio':>6} {'demo cos':>8} {'photo cos':>9} "
          f"{'max |diff|':>10}  cat photo top class")
    for (rt, pr), bb in bbs.items():
        got = embed_all(bb, test)
        cos_p = min(float(cosine(bb(p[None]), r)[0]) for p, r in zip(photos, ref_p))
        top = int(np.argmax(bb.logits(photos[0][None])[0]))
        print(f"{rt:>12} {pr:>9} {med[(rt, pr)]:7.1f} {med[(rt, pr)] / base:6.2f} "
              f"{cosine(got, ref_t).min():8.4f} {cos_p:9.4f} {np.abs(got - ref_t).max():10.2e}  "
              f"{top} ({'cat' if 281 <= top <= 285 else 'NOT a cat class'})")
    return ort32


def rate(bb, frames: np.ndarray, threads: int, min_seconds: float) -> float:
    """Images per second for repeated calls on ``frames`` (one warm-up call excluded)."""
    bb.threads = threads
    bb(frames[:1] if len(frames) > 1 else frames)
    n, t0 = 0, time.perf_counter()
    while True:
        bb(frames)
        n += len(frames)
        dt = time.perf_counter() - t0
        if dt >= min_seconds and n >= 2 * len(frames):
            return n / dt


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--min-seconds", type=float, default=1.0)
    ap.add_argument("--skip-only", action="store_true", help="only the frame-skipping table")
    ap.add_argument("--demo", action="store_true", help="only the demo-fleet accuracy (two nights in-process)")
    ap.add_argument("--skip-threshold", type=float, help="with --demo: the skip_threshold to compare")
    args = ap.parse_args()
    print(f"load average at start: {' '.join(f'{x:.2f}' for x in os.getloadavg())} on {os.cpu_count()} cores")
    if args.demo:
        demo_accuracy(Path(tempfile.mkdtemp(prefix="fleetsift-bench-demo-")), args.skip_threshold)
        return
    if args.skip_only:
        bb = load_backbone(threads=2)
        bb.use_onnxruntime(Path(tempfile.mkdtemp(prefix="fleetsift-bench-onnx-")), weights.backbone_fingerprint())
        skip_sweep(bb)
        return

    rng = np.random.default_rng(0)
    frames224 = rng.integers(0, 256, size=(32, 224, 224, 3), dtype=np.uint8)
    frames480 = rng.integers(0, 256, size=(32, 480, 640, 3), dtype=np.uint8)
    models = {cl: load_backbone(threads=2, channels_last=cl) for cl in (True, False)}
    configs = list(itertools.product((1, 2), (1, 16, 32), (True, False)))  # threads, batch, channels_last
    extra = ("640x480 input (resize included), threads 2, batch 32, channels_last", 2, 32, True)
    results: dict = {c: [] for c in configs}
    results[extra] = []
    print(f"torch {torch.__version__}, {os.cpu_count()} CPUs visible, {args.rounds} rounds, "
          f">= {args.min_seconds:.1f} s per measurement", flush=True)
    for r in range(args.rounds):
        for c in configs:
            threads, batch, cl = c
            results[c].append(rate(models[cl], frames224[:batch], threads, args.min_seconds))
        results[extra].append(rate(models[True], frames480, 2, args.min_seconds))
        print(f"round {r + 1}/{args.rounds} done", flush=True)

    med = {c: statistics.median(v) for c, v in results.items()}
    print("\nimages/s at 224 px (median over rounds; min..max)")
    print(f"{'threads':>7} {'batch':>5} {'channels_last':>13} {'img/s':>8}   range")
    for c in configs:
        v = results[c]
        print(f"{c[0]:>7} {c[1]:>5} {str(c[2]):>13} {med[c]:8.1f}   {min(v):.1f}..{max(v):.1f}")
    print(f"{extra[0]}: {med[extra]:.1f} img/s")

    print("\nratios (same run)")
    for threads, batch in itertools.product((1, 2), (1, 16, 32)):
        print(f"  channels_last on/off, threads {threads}, batch {batch:>2}: "
              f"{med[(threads, batch, True)] / med[(threads, batch, False)]:.2f}x")
    for batch in (1, 16, 32):
        print(f"  threads 2/1, batch {batch:>2}, channels_last: {med[(2, batch, True)] / med[(1, batch, True)]:.2f}x")
    for threads in (1, 2):
        print(f"  batch 32/1, threads {threads}, channels_last: "
              f"{med[(threads, 32, True)] / med[(threads, 1, True)]:.2f}x")
    print(f"  640x480 (with resize) / 224 input, threads 2, batch 32: {med[extra] / med[(2, 32, True)]:.2f}x")
    skip_sweep(runtimes(args.rounds, args.min_seconds))
    print(f"load average at end: {' '.join(f'{x:.2f}' for x in os.getloadavg())}")


if __name__ == "__main__":
    main()

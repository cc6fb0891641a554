"""Peak memory (RSS) of decoding and embedding a long video: does it stay flat as the video gets longer?

Run: .venv/bin/python bench/memory.py [--minutes 5 30] [--fps 10] [--batch 8] [--threads 2] [--decode-only]

For each length a 1280x720 MPEG-4 video with a simple moving pattern is generated once with PyAV and cached under
/tmp/fleetsift-bench/. Each measurement runs in a fresh subprocess (so one peak cannot hide in another) and reports
resource.getrusage(RUSAGE_SELF).ru_maxrss, the kernel's high-water mark of the process's resident set:
  decode        fleetsift.featurizers.video.iter_frames(path, 5 Hz), frames dropped as they come
  decode+embed  what tasks/stages.py run_embed does with the default profile: embed.embed_frames over
                video.iter_frames(path, 5 Hz) decoded in a thread ahead of the Lite0 backbone (ONNX Runtime
                float32), frames skipped as unchanged, the rows written to the .npz as they come (store.RowWriter)
The RSS right after the imports (and, for embed, the model load) is printed too, so the workload's own share shows.
Target: peaks flat in the video's length and under 1.5 GiB.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
CACHE = Path("/tmp/fleetsift-bench")
W, H = 1280, 720
TARGET_GIB = 1.5


def make_video(minutes: float, fps: float) -> Path:
    """A cached 720p MPEG-4 test video: a scrolling gradient with a bouncing block (cheap to draw and encode)."""
    import numpy as np

    sys.path.insert(0, str(ROOT))
    from fleetsift.demo.video import write_video

    CACHE.mkdir(parents=True, exist_ok=True)
    path = CACHE / f"long-{minutes:g}min-{W}x{H}-{fps:g}fps-mpeg4.mp4"
    if path.exists():
        return path
    n = int(round(minutes * 60 * fps))
    y = np.arange(H)
    base = np.empty((H, 2 * W, 3), np.uint8)
    xx = np.arange(2 * W)
    base[..., 0] = (xx[None, :] * 255 // (2 * W)).astype(np.uint8)
    base[..., 1] = (y[:, None] * 255 // H).astype(np.uint8)
    base[..., 2] = ((xx[None, :] // 64 + y[:, None] // 64) % 2 * 120).astype(np.uint8)

    def frames():
        for i in range(n):
            off = (7 * i) % W
            img = np.ascontiguousarray(base[:, off:off + W])
            bx = int((W - 160) * (0.5 + 0.5 * np.sin(i / 37.0)))
            by = int((H - 160) * (0.5 + 0.5 * np.cos(i / 53.0)))
            img[by:by + 160, bx:bx + 160] = (255, 255, 255)
            yield img

    tmp = path.with_suffix(".tmp.mp4")
    t0 = time.perf_counter()
    write_video(tmp, frames(), fps, codec="mpeg4", options={"qscale": "6", "g": "60"})
    tmp.replace(path)  # an interrupted generation is never taken for a finished video
    print(f"  generated {path.name}: {n} frames, {path.stat().st_size / 2**20:.0f} MiB in "
          f"{time.perf_counter() - t0:.0f} s", flush=True)
    return path


CHILD = r"""
import json, resource, sys, time
sys.path.insert(0, sys.argv[1])
mode, path, sample_hz, batch, threads = sys.argv[2], sys.argv[3], float(sys.argv[4]), int(sys.argv[5]), int(sys.argv[6])
def rss_now_mib():
    with open("/proc/self/statm") as f:
        return int(f.read().split()[1]) * resource.getpagesize() / 2**20
from fleetsift.featurizers import video
bb = None
if mode == "embed":
    import os, tempfile
    from fleetsift.featurizers import embed, weights
    from fleetsift.profile import VideoStream
    from fleetsift.store import RowWriter
    bb = embed.load_backbone(threads=threads)
    bb.use_onnxruntime(os.path.join(tempfile.gettempdir(), "fleetsift-bench", "onnx"), weights.backbone_fingerprint())
    bb(__import__("numpy").zeros((batch, 720, 1280, 3), "uint8"))  # the runtime's buffers for a full batch
ready = rss_now_mib()
t0 = time.perf_counter()
st = {}
if mode == "decode":
    n = sum(1 for _ in video.iter_frames(path, sample_hz, stats=st))
    out_bytes = 0
else:
    out = os.path.join(tempfile.mkdtemp(), "emb.npz")
    with RowWriter(out, "emb", bb.dim) as w:
        t, _ = embed.embed_frames(video.iter_frames(path, sample_hz, threads=1, stats=st), bb, batch_size=batch,
                                  skip_threshold=VideoStream.skip_threshold, max_gap_s=2.0 / sample_hz,
                                  sink=lambda _t, rows: w.append(rows), decode_ahead=2 * batch)
        w.commit(t=t)
    n, out_bytes = len(t), os.path.getsize(out)
peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # KiB on Linux
print(json.dumps({"frames": n, "decoded": st.get("n_decoded"), "seconds": time.perf_counter() - t0,
                  "ready_mib": ready, "peak_mib": peak, "output_mib": out_bytes / 2**20}))
"""


def measure(mode: str, path: Path, sample_hz: float, batch: int, threads: int) -> dict:
    p = subprocess.run([sys.executable, "-c", CHILD, str(ROOT), mode, str(path), str(sample_hz), str(batch),
                        str(threads)], capture_output=True, text=True, cwd=ROOT)
    if p.returncode != 0:
        raise SystemExit(f"{mode} on {path.name} failed:\n{p.stderr[-3000:]}")
    return json.loads(p.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--minutes", type=float, nargs="+", default=[5.0, 30.0])
    ap.add_argument("--fps", type=float, default=10.0, help="frame rate of the generated videos")
    ap.add_argument("--sample-hz", type=float, default=5.0)
    ap.add_argument("--batch", type=int, default=8)
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--decode-only", action="store_true")
    a = ap.parse_args()

    print(f"videos {W}x{H} MPEG-4 at {a.fps:g} fps; frames sampled at {a.sample_hz:g} Hz; batch {a.batch}, "
          f"{a.threads} threads; {os.cpu_count()} CPUs visible", flush=True)
    paths = {m: make_video(m, a.fps) for m in a.minutes}
    modes = ["decode"] + ([] if a.decode_only else ["embed"])
    res: dict = {}
    for mode in modes:
        for m in a.minutes:
            r = measure(mode, paths[m], a.sample_hz, a.batch, a.threads)
            res[(mode, m)] = r
            print(f"  {mode:<6} {m:>5g} min: {r['frames']:>6} frames taken of {r['decoded']:>6} decoded in "
                  f"{r['seconds']:6.0f} s; RSS after imports{' + model' if mode == 'embed' else ''} "
                  f"{r['ready_mib']:7.0f} MiB, peak {r['peak_mib']:7.0f} MiB (output arrays "
                  f"{r['output_mib']:.1f} MiB)", flush=True)
    print()
    lo, hi = min(a.minutes), max(a.minutes)
    for mode in modes:
        p_lo, p_hi = res[(mode, lo)]["peak_mib"], res[(mode, hi)]["peak_mib"]
        ok = "within" if max(p_lo, p_hi) < TARGET_GIB * 1024 else "ABOVE"
        print(f"{'decode+embed' if mode == 'embed' else 'decode':<13} peak RSS {lo:g} min {p_lo:.0f} MiB, "
              f"{hi:g} min {p_hi:.0f} MiB, ratio {hi:g}/{lo:g} min = {p_hi / p_lo:.3f} "
              f"({ok} the {TARGET_GIB} GiB target)")


if __name__ == "__main__":
    main()

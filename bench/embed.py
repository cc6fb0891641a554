"""Throughput of the EfficientNet-Lite0 frame embedder: batch size x threads x channels_last, side by side.

Run: .venv/bin/python bench/embed.py [--rounds 3] [--min-seconds 1.0]
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

import numpy as np
import torch

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
from fleetsift.featurizers.embed import load_backbone  # noqa: E402


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
    args = ap.parse_args()

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


if __name__ == "__main__":
    main()

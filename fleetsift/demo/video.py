"""Writing videos, for the demo fleet and for tests that need a video of known content and timing.

Nothing in the pipeline writes video; this lives with the demo generators so the embed stage's code does not
contain it.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from fractions import Fraction
from pathlib import Path

import av
import numpy as np


def write_video(path: str | Path, frames: Iterable[np.ndarray], fps: float, codec: str = "libx264",
                pts: Sequence[int] | None = None, time_base: Fraction | None = None, *,
                options: dict[str, str] | None = None, pix_fmt: str = "yuv420p") -> int:
    """Encode uint8 RGB frames (H, W, 3; H and W even for 4:2:0) to a video file; returns the frame count.

    pts: optional per-frame presentation timestamps, integers in `time_base` units (default time base 1/90000,
    the MPEG system clock), for variable frame timing; without pts frame i has pts i in time base 1/fps.
    MPEG-4 Part 2 allows time-base denominators up to 65535 only. For MP4/MOV files the movie timescale is set
    to the stream's, because the default (1/1000) rounds a non-zero start time in the edit list and shifts
    every pts by up to 0.5 ms. options: encoder options (e.g. {"crf": "28", "preset": "veryfast"}).
    """
    path = Path(path)
    rate = Fraction(fps).limit_denominator(1001)
    if time_base is None:
        time_base = Fraction(1, 90000) if pts is not None else 1 / rate
    time_base = Fraction(time_base)
    if codec == "mpeg4" and time_base.denominator > 65535:
        raise ValueError(f"mpeg4 needs a time-base denominator <= 65535, got {time_base}")
    container_opts = {}
    if path.suffix.lower() in (".mp4", ".mov", ".m4v"):
        container_opts = {"movie_timescale": str(time_base.denominator), "movflags": "+faststart"}
    n = 0
    with av.open(str(path), mode="w", options=container_opts) as container:
        stream = None
        for img in frames:
            img = np.ascontiguousarray(img, dtype=np.uint8)
            if stream is None:
                stream = container.add_stream(codec, rate=rate)
                stream.height, stream.width = img.shape[:2]
                stream.pix_fmt = pix_fmt
                stream.time_base = time_base
                stream.codec_context.time_base = time_base
                if options:
                    stream.options = dict(options)
            frame = av.VideoFrame.from_ndarray(img, format="rgb24")
            if pts is not None:
                if n >= len(pts):
                    raise ValueError(f"more frames than pts values ({len(pts)})")
                frame.pts = int(pts[n])
                frame.time_base = time_base
            else:
                frame.pts = n
                frame.time_base = 1 / rate
            for packet in stream.encode(frame):
                container.mux(packet)
            n += 1
        if stream is None:
            raise ValueError("write_video needs at least one frame")
        if pts is not None and n != len(pts):
            raise ValueError(f"{n} frames but {len(pts)} pts values")
        for packet in stream.encode(None):
            container.mux(packet)
    return n

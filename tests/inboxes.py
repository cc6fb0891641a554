"""Profiles and inboxes the tests share (tests/ is on sys.path under pytest).

`profile_toml` writes the sensor profile most tests read recordings with: the demo fleet's streams (a 6-axis IMU
in imu.csv, a camera.mp4 whose clock runs 0.35 s ahead) on the default 50 Hz clock, with any section or stream
key replaced. A test about one particular profile text keeps its own. `table_inbox` writes a video-free inbox of
IMU-like CSV recordings for nights that run in-process without torch.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd

IMU_CHANNELS = ("ax", "ay", "az", "gx", "gy", "gz")
WINDOWING = {"rate_hz": 50.0, "window_s": 4.0, "hop_s": 2.0, "max_gap_s": 0.25}
IMU = {"kind": "table", "file": "imu.csv", "time_column": "t", "time_unit": "s", "channels": list(IMU_CHANNELS)}
CAMERA = {"kind": "video", "file": "camera.mp4", "clock_offset_s": -0.35}


def _value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, dict):
        return "{ " + ", ".join(f"{k} = {_value(x)}" for k, x in v.items()) + " }"
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_value(x) for x in v) + "]"
    if isinstance(v, str):
        return json.dumps(v)
    return repr(v)


def _section(header: str, keys: dict) -> str:
    return f"[{header}]\n" + "".join(f"{k} = {_value(v)}\n" for k, v in keys.items())


def profile_toml(*, windowing: dict | None = None, descriptor: dict | None = None, scoring: dict | None = None,
                 imu: dict | None = None, camera: dict | bool | None = True, more: str = "") -> str:
    """Profile TOML text: each dict is laid over that section's keys (``camera=False`` leaves the camera out,
    ``camera=dict`` changes its keys); ``more`` is appended as it is."""
    parts = ["\n" + _section("windowing", {**WINDOWING, **(windowing or {})})]
    if descriptor:
        parts.append(_section("descriptor", descriptor))
    if scoring:
        parts.append(_section("scoring", scoring))
    parts.append("\n" + _section("streams.imu", {**IMU, **(imu or {})}))
    if camera:
        parts.append(_section("streams.camera", {**CAMERA, **(camera if isinstance(camera, dict) else {})}))
    return "".join(parts) + more


def table_inbox(root: Path, seconds: dict[str, float], *, rate_hz: float = 100.0, seed: int = 5,
                channels=("ax", "ay", "gz"), scoring: dict | None = None) -> Path:
    """An inbox of IMU-like CSV recordings (random walks plus noise), ``seconds`` long each, and its profile:
    one table stream, no video; ``scoring`` defaults to k 2 with a 5 s exclusion zone (short recordings)."""
    rng = np.random.default_rng(seed)
    root.mkdir(parents=True)
    (root / "profile.toml").write_text(profile_toml(scoring=scoring or {"k": 2, "exclusion_s": 5.0},
                                                    imu={"channels": list(channels)}, camera=False))
    for name, secs in seconds.items():
        t = np.arange(0, secs, 1.0 / rate_hz)
        (root / name).mkdir()
        x = rng.normal(0, 1, (len(t), len(channels))).cumsum(axis=0) * 0.05 + rng.normal(0, 0.2, (len(t), len(channels)))
        pd.DataFrame({"t": t, **{c: x[:, j] for j, c in enumerate(channels)}}).to_csv(root / name / "imu.csv",
                                                                                   index=False)
    return root

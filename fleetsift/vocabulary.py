"""The names of things, defined once: every module that validates, loops over or prints one of these imports it.

Defaults (which metric, which descriptor, k, ridge, ...) are not here: the profile's dataclasses
(fleetsift/profile.py) hold them, and the Python API functions read their defaults from those.
"""

from __future__ import annotations

# Seconds per unit of a table stream's time column.
TIME_UNITS = {"s": 1.0, "ms": 1e-3, "us": 1e-6, "ns": 1e-9}
STREAM_KINDS = ("table", "video")
# ROS 2 message times: the header stamp, or the time the bag received the message.
STAMP_SOURCES = ("header", "receive")

DESCRIPTOR_KINDS = ("ledoit_wolf", "oas", "rbf", "lagged")
# Every window is scored with each of these; [scoring] metric names the primary one (flags, attribution).
METRICS = ("riemann", "logeuclid", "euclid")
# What the SPD geometry computes: the scored metrics plus two more for comparison.
SPD_METRICS = METRICS + ("logdet", "wasserstein")
# knn: k-th nearest neighbour distance; density: local outlier factor; mean: distance to the Fréchet mean.
SCORING_METHODS = ("knn", "density", "mean")
# How the k nearest reference distances make a score: the k-th one, or their mean.
KNN_STATS = ("kth", "mean")
# Neighbours counted in recordings (the nearest window of each of the k nearest recordings) or in windows.
KNN_UNITS = ("recording", "window")
# Where a night's references come from: earlier nights' unflagged windows, tonight's batch, chosen recordings.
BASELINE_SOURCES = ("history", "batch", "recordings")
# An engineer's verdict on a window or a recording.
VERDICTS = ("normal", "fault")
# Who runs the frame-embedding backbone: torch itself, or its ONNX export in ONNX Runtime's CPU provider.
RUNTIMES = ("torch", "onnxruntime")
# Arithmetic of the backbone: float32, or int8 (ONNX Runtime static quantisation, calibrated on the fleet's frames).
PRECISIONS = ("float32", "int8")

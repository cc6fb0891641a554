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
SCORING_METHODS = ("knn", "mean")
# How the k nearest reference distances make a score: the k-th one, or their mean.
KNN_STATS = ("kth", "mean")

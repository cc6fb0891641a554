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

# What a window's SPD matrix is: a covariance of its channels, an RBF kernel between them, or a covariance of the
# delay embedding (dynamics). The covariance ones are estimated with one of the SHRINKAGE estimators.
DESCRIPTOR_KINDS = ("covariance", "rbf", "lagged")
SHRINKAGE_ESTIMATORS = ("ledoit_wolf", "oas")
# Every window is scored with each of these; [scoring] metric names the primary one (flags, attribution).
METRICS = ("riemann", "logeuclid", "euclid")
# What the SPD geometry computes: the scored metrics plus two more for comparison.
SPD_METRICS = METRICS + ("logdet", "wasserstein")
# knn: k-th nearest neighbour distance; density: local outlier factor; frechet_mean: distance to the Fréchet mean.
KNN, DENSITY, FRECHET_MEAN = "knn", "density", "frechet_mean"
SCORING_METHODS = (KNN, DENSITY, FRECHET_MEAN)
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

# Status words, one vocabulary for recordings, stages and runs. A recording is `scored`, or `unscored` with the
# reason (it could not be read or scored; nothing is implied about the vehicle). A stage's result for a recording
# is `ok` or `unscored` (the stage failed on it, so it cannot be scored tonight). A run is `ok` when every
# recording was scored, `partial` when some were left unscored. A window that cannot be scored (it straddles a gap)
# is an unscored window: its score is empty.
SCORED, UNSCORED, OK, PARTIAL = "scored", "unscored", "ok", "partial"
RECORDING_STATUSES = (SCORED, UNSCORED)
STAGE_STATUSES = (OK, UNSCORED)
RUN_STATUSES = (OK, PARTIAL)

# Profile keys and values renamed in 0.3, still read for one release with a deprecation message:
# (section, old key) -> new key, and (section, key, old value) -> new value.
DEPRECATED_KEYS = {("scoring", "top_channels"): "n_top_channels"}
DEPRECATED_VALUES = {("scoring", "method", "mean"): {"method": "frechet_mean"},
                     ("descriptor", "kind", "ledoit_wolf"): {"kind": "covariance", "shrinkage": "ledoit_wolf"},
                     ("descriptor", "kind", "oas"): {"kind": "covariance", "shrinkage": "oas"}}
# Read from stores written before 0.3, which called an unscored recording "quarantined".
LEGACY_STATUSES = {"quarantined": UNSCORED}

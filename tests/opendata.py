"""Recordings built from open labelled inertial data, to check detection on data we did not generate.

Source: the UEA BasicMotions data set (Bagnall, Dau, Lines, Flynn, Large, Bostrom, Southam & Keogh, "The UEA
multivariate time series classification archive, 2018", arXiv:1811.00075): a smart watch's 3-D accelerometer and
3-D gyroscope sampled at 10 Hz, 80 cases of 10 s (100 samples) in four classes, Standing, Walking, Running and
Badminton. The files ship inside the `sktime` wheel (and the `aeon` wheel); we read them from the installed
package folder without importing the package (sktime pins older pandas releases, and its import is not needed).

A recording here is a continuous 6-channel table: normal-activity cases (by default Standing and Walking) one
after another on a jittered ~10 Hz clock, with abnormal-activity cases (Running, Badminton) embedded in some of
them. The labels CSV marks each embedded case, in seconds from the recording's first sample.
"""

from __future__ import annotations

import importlib.util
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from fleetsift.errors import InputError

PACKAGES = ("sktime", "aeon")
NAME = "BasicMotions"
CITATION = ("Bagnall A., Dau H. A., Lines J., Flynn M., Large J., Bostrom A., Southam P., Keogh E. (2018). The UEA "
            "multivariate time series classification archive, 2018. arXiv:1811.00075.")
# Dimension order of the .ts files: accelerometer x, y, z, then gyroscope x, y, z (the archive's description
# lists the accelerometer first; from memory, not stated per dimension in the file).
CHANNELS = ("acc_x", "acc_y", "acc_z", "gyr_x", "gyr_y", "gyr_z")
RATE_HZ = 10.0
NORMAL = ("Standing", "Walking")
ABNORMAL = ("Running", "Badminton")


def data_dir() -> Path:
    """The BasicMotions folder inside an installed sktime or aeon (found without importing the package)."""
    for pkg in PACKAGES:
        spec = importlib.util.find_spec(pkg)
        if spec is None or not spec.submodule_search_locations:
            continue
        d = Path(list(spec.submodule_search_locations)[0]) / "datasets" / "data" / NAME
        if (d / f"{NAME}_TRAIN.ts").exists():
            return d
    raise InputError(NAME, "package", f"one of {list(PACKAGES)} installed (it ships {NAME})", "neither found")


def read_ts(path: str | Path) -> tuple[np.ndarray, np.ndarray]:
    """Parse an equal-length multivariate .ts file (sktime/aeon format) -> (X (n, dims, length), labels (n,)).

    Header lines start with ``@`` (``@dimensions``, ``@seriesLength``, ``@classLabel true A B ..``), comments with
    ``#``; each data line holds the dimensions separated by ``:`` (values by ``,``) and the class label last.
    The header's declared dimensions, length and classes are checked against the data.
    """
    path = Path(path)
    header: dict[str, str] = {}
    cases, labels = [], []
    in_data = False
    for lineno, raw in enumerate(path.read_text(encoding="utf-8").splitlines(), 1):
        line = raw.strip()
        if not line or line.startswith("#"):
            continue
        if not in_data:
            if line.lower() == "@data":
                in_data = True
            elif line.startswith("@"):
                key, _, val = line[1:].partition(" ")
                header[key.lower()] = val.strip()
            continue
        *dims, label = line.split(":")
        try:
            cases.append([[float(v) for v in d.split(",")] for d in dims])
        except ValueError as e:
            raise InputError(path, f"line {lineno}", "comma-separated numbers", str(e)) from None
        labels.append(label.strip())
    if not cases:
        raise InputError(path, "@data", "at least one case", "none")
    lengths = {len(d) for c in cases for d in c}
    n_dims = {len(c) for c in cases}
    if len(lengths) != 1 or len(n_dims) != 1:
        raise InputError(path, "cases", "equal-length cases with the same dimensions",
                         f"lengths {sorted(lengths)}, dimensions {sorted(n_dims)}")
    X = np.asarray(cases, dtype=np.float64)
    y = np.asarray(labels)
    if "dimensions" in header and int(header["dimensions"]) != X.shape[1]:
        raise InputError(path, "@dimensions", header["dimensions"], X.shape[1])
    if "serieslength" in header and int(header["serieslength"]) != X.shape[2]:
        raise InputError(path, "@seriesLength", header["serieslength"], X.shape[2])
    declared = header.get("classlabel", "").split()
    if declared and declared[0] == "true" and not set(y) <= set(declared[1:]):
        raise InputError(path, "@classLabel", declared[1:], sorted(set(y)))
    return X, y


def load_basicmotions() -> tuple[np.ndarray, np.ndarray]:
    """All 80 cases (TRAIN then TEST): X (80, 6, 100) float64, labels (80,)."""
    d = data_dir()
    parts = [read_ts(d / f"{NAME}_{split}.ts") for split in ("TRAIN", "TEST")]
    return np.concatenate([p[0] for p in parts]), np.concatenate([p[1] for p in parts])


@dataclass
class BuiltFleet:
    inbox: Path
    labels: Path
    recordings: list[str]
    intervals: pd.DataFrame  # recording_id, t_start_s, t_end_s, kind


PROFILE = """# BasicMotions (UEA archive, Bagnall et al. 2018) as a fleet: a watch IMU at ~10 Hz.
[windowing]
rate_hz = {rate}
window_s = {window}
hop_s = {hop}
max_gap_s = 0.35   # 3.5 nominal sample intervals

[descriptor]
kind = "covariance"
shrinkage = "ledoit_wolf"
include_mean = true

[scoring]
metric = "riemann"
k = 5
exclusion_s = {exclusion}   # a case lasts 10 s: neighbours from the same case never count
trim_fraction = 0.1
threshold_c = 3.0

[streams.imu]
kind = "table"
file = "imu.csv"
time_column = "t"
time_unit = "s"
channels = [{channels}]
"""


def build_fleet(out_dir: str | Path, n_recordings: int = 4, normal_cases: int = 8, abnormal_plan=None,
                seed: int = 0, window_s: float = 5.0, hop_s: float = 2.5, jitter_s: float = 0.01) -> BuiltFleet:
    """Write an inbox of BasicMotions recordings (imu.csv each), its profile.toml and labels.csv.

    Each recording is ``normal_cases`` cases drawn without replacement from the Standing and Walking cases, in
    random order; ``abnormal_plan[i]`` lists the abnormal classes embedded in recording i, each as one whole case
    at a random position between normal ones (default: none in the first recording, then Running, Badminton,
    both). Sample times are 0.1 s apart plus Gaussian jitter (sd ``jitter_s``), from a per-recording epoch.
    """
    X, y = load_basicmotions()
    rng = np.random.default_rng(seed)
    if abnormal_plan is None:
        abnormal_plan = [[], ["Running"], ["Badminton"], ["Running", "Badminton"]][:n_recordings]
        abnormal_plan += [[]] * (n_recordings - len(abnormal_plan))
    normal_idx = rng.permutation(np.flatnonzero(np.isin(y, NORMAL)))
    if n_recordings * normal_cases > len(normal_idx):
        raise InputError(NAME, "normal_cases", f"at most {len(normal_idx) // n_recordings} per recording",
                         normal_cases)
    abnormal_pool = {c: list(rng.permutation(np.flatnonzero(y == c))) for c in ABNORMAL}
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    (out / "profile.toml").write_text(PROFILE.format(
        rate=RATE_HZ, window=window_s, hop=hop_s, exclusion=10.0,
        channels=", ".join(f'"{c}"' for c in CHANNELS)), encoding="utf-8")
    rows, names = [], []
    n_len = X.shape[2]
    for i in range(n_recordings):
        seq = [(int(j), "normal") for j in normal_idx[i * normal_cases:(i + 1) * normal_cases]]
        for cls in abnormal_plan[i]:
            pos = int(rng.integers(1, len(seq)))  # never first or last: an event has normal context
            seq.insert(pos, (int(abnormal_pool[cls].pop()), cls))
        data = np.concatenate([X[j].T for j, _ in seq])  # (samples, 6)
        n = len(data)
        t = np.arange(n) / RATE_HZ + rng.normal(0.0, jitter_s, n)
        t = np.maximum.accumulate(t)  # jitter never reorders samples (sd << interval anyway)
        epoch = 1.7e9 + 3600.0 * i
        name = f"watch-{i + 1:02d}"
        rec = out / name
        rec.mkdir(exist_ok=True)
        pd.DataFrame({"t": np.round(epoch + t, 4), **{c: data[:, k] for k, c in enumerate(CHANNELS)}}).to_csv(
            rec / "imu.csv", index=False, float_format="%.6f")
        t_first = np.round(epoch + t[0], 4) - epoch
        for pos, (_, kind) in enumerate(seq):
            if kind != "normal":
                # Seconds from the recording's first sample; a case spans n_len samples of 1/RATE_HZ.
                s = pos * n_len / RATE_HZ - t_first
                rows.append({"recording_id": name, "t_start_s": round(s, 3), "t_end_s": round(s + n_len / RATE_HZ, 3),
                             "kind": kind.lower()})
        names.append(name)
    intervals = pd.DataFrame(rows, columns=["recording_id", "t_start_s", "t_end_s", "kind"])
    labels = out / "labels.csv"
    intervals.to_csv(labels, index=False)
    return BuiltFleet(inbox=out, labels=labels, recordings=names, intervals=intervals)


# --------------------------------------------------------------------------------------- pairs of classes as fleets

CLASSES = ("Standing", "Walking", "Running", "Badminton")
# The default profile but for the clock rate: the watch logs at 10 Hz, so that is the common clock.
PAIR_PROFILE = """# BasicMotions (UEA archive, Bagnall et al. 2018) as a fleet: a watch IMU at ~10 Hz. Default settings.
[windowing]
rate_hz = 10.0

[streams.imu]
kind = "table"
file = "imu.csv"
channels = [{channels}]
"""


@dataclass
class Night:
    inbox: Path
    labels: Path
    recordings: list[str]


def build_pair_nights(out_dir: str | Path, normal: str, anomaly: str, seed: int = 0, nights: int = 2,
                      cases: tuple[int, ...] = (3, 3, 2, 2), recurring: int = 3, jitter_s: float = 0.01,
                      profile: str = PAIR_PROFILE) -> list[Night]:
    """Nights of a fleet whose normal operation is one class and whose fault is another, each night an inbox.

    Each recording of a night is ``cases[i]`` whole cases of the normal class, drawn without replacement across
    all nights (no night sees another night's normal cases); in each of the first ``recurring`` recordings of every
    night one whole case of the anomaly class is inserted between two normal ones (the same fault recurring in
    several recordings of one night). With the default ``cases`` two nights use all 20 normal cases of a class.
    ``labels.csv`` marks each inserted case (``kind`` = the class) and, as ``kind = ignore``, every junction between
    two cases: a window across a junction mixes two independently recorded cases, which no vehicle does, so it is
    neither normal operation nor the fault and the evaluation leaves it out.
    """
    X, y = load_basicmotions()
    if normal not in CLASSES or anomaly not in CLASSES or normal == anomaly:
        raise InputError(NAME, "classes", f"two different classes of {CLASSES}", (normal, anomaly))
    rng = np.random.default_rng(seed)
    normal_pool = list(rng.permutation(np.flatnonzero(y == normal)))
    anomaly_pool = list(rng.permutation(np.flatnonzero(y == anomaly)))
    if nights * sum(cases) > len(normal_pool) or nights * recurring > len(anomaly_pool):
        raise InputError(NAME, "cases", f"at most {len(normal_pool)} normal cases over all nights",
                         nights * sum(cases))
    n_len = X.shape[2]
    out = []
    for night in range(nights):
        inbox = Path(out_dir) / f"night-{night + 1}"
        inbox.mkdir(parents=True, exist_ok=True)
        (inbox / "profile.toml").write_text(profile.format(channels=", ".join(f'"{c}"' for c in CHANNELS)),
                                            encoding="utf-8")
        rows, names = [], []
        for i, n_cases in enumerate(cases):
            seq = [(int(normal_pool.pop()), False) for _ in range(n_cases)]
            if i < recurring:
                seq.insert(int(rng.integers(1, len(seq))), (int(anomaly_pool.pop()), True))
            data = np.concatenate([X[j].T for j, _ in seq])
            t = np.arange(len(data)) / RATE_HZ + rng.normal(0.0, jitter_s, len(data))
            t = np.maximum.accumulate(t)
            epoch = 1.7e9 + 86400.0 * night + 3600.0 * i
            name = f"n{night + 1}-watch-{i + 1:02d}"
            (inbox / name).mkdir(exist_ok=True)
            pd.DataFrame({"t": np.round(epoch + t, 4), **{c: data[:, k] for k, c in enumerate(CHANNELS)}}).to_csv(
                inbox / name / "imu.csv", index=False, float_format="%.6f")
            t_first = np.round(epoch + t[0], 4) - epoch
            for pos, (_, is_fault) in enumerate(seq):
                s = pos * n_len / RATE_HZ - t_first
                if is_fault:
                    rows.append({"recording_id": name, "t_start_s": round(s, 3), "t_end_s": round(s + n_len / RATE_HZ, 3),
                                 "kind": anomaly.lower()})
                if pos:  # the junction with the case before
                    rows.append({"recording_id": name, "t_start_s": round(s - 0.05, 3), "t_end_s": round(s + 0.05, 3),
                                 "kind": "ignore"})
            names.append(name)
        labels = inbox / "labels.csv"
        pd.DataFrame(rows, columns=["recording_id", "t_start_s", "t_end_s", "kind"]).to_csv(labels, index=False)
        out.append(Night(inbox=inbox, labels=labels, recordings=names))
    return out


def score_nights(nights: list[Night], store: str | Path, comparison: bool = True) -> list[dict]:
    """Run every night through the pipeline into one store (in-process, the stages without Prefect) and evaluate
    each against its labels: per night the evaluate JSON (AUCs, standard errors, comparison detectors) plus the
    run's baseline information."""
    from fleetsift.flows import night as night_flow
    from fleetsift.flows.evaluate import evaluate_store
    from fleetsift.tasks import stages

    plain = night_flow.Steps(tables=stages.run_tables, embed=stages.run_embed, score=stages.run_score,
                             write=stages.run_write)
    out = []
    for n in nights:
        res = night_flow.run_night(plain, inbox=str(n.inbox), store=str(store), progress=False)
        ev = evaluate_store(str(store), res["run_id"], str(n.labels), comparison=comparison)
        ev["baseline"] = res["score"]["baseline"]
        out.append(ev)
    return out

"""Demo fleet generator: invented warehouse inventory rovers patrolling aisles, with planted anomalies.

Each rover carries a forward camera (15 fps, its clock 0.35 s ahead of the IMU's) and a 6-axis IMU logged at a
jittery ~200 Hz with a few dropped samples. A rover drives a serpentine patrol through a warehouse of pallet racks:
along an aisle at varying speed with short inventory stops, a 90-degree turn in place at the aisle end, a short leg
along the cross aisle, another turn into the next aisle. The camera frames are rendered here with numpy (a column
raycaster over the rack layout, the floor projected per pixel), so no third-party footage is involved.

Planted anomalies (each in some recordings; at least three recordings stay normal when the fleet has six or more):
  bearing  a worn wheel bearing: a 14-18 Hz rattle on the accelerometer (and a little on the gyro), scaled by wheel
           speed, for 10-14 s
  bump     the rover bumps into a rack: a ~2 g shock ringing for ~0.2 s, a hard stop, the camera shaking ~0.5 s
  pallet   a pallet left in the aisle: the rover stops in front of it, waits, and squeezes past it slowly
  person   a person in a hi-vis vest crosses the aisle through gaps in the racks; the rover slows and waits
  ramp     a ramp: the gravity vector tilts by 7-9 degrees from z towards x over ~3 s, stays, tilts back (11 s in all);
           the camera horizon shifts and tilts with it

Body frame of the IMU: x forward, y left, z up (REP 103 convention, common practice for ground robots). The
accelerometer reads specific force, so a rover at rest on level ground reads az = +9.81 m/s^2.

Everything is deterministic from the seed: the CSVs and labels are byte-identical across runs, the rendered frames
are identical, and so are the encoded videos (x264 runs without macroblock-tree rate control, see render_video).
"""

from __future__ import annotations

import argparse
import math
import shutil
import time
from dataclasses import dataclass, field
from fractions import Fraction
from pathlib import Path

import numpy as np
from scipy import ndimage, signal

G = 9.81
KINDS = ("bearing", "bump", "pallet", "person", "ramp")
CAMERA_OFFSET_S = 0.35  # camera pts = true time + this; the profile's camera clock_offset_s is its negative
CAMERA_TIME_BASE = 90000  # MPEG system clock ticks per second
IMU_DT, IMU_JITTER = 0.005, 0.0006  # s; each sample interval is uniform in IMU_DT +- IMU_JITTER
SIM_DT = 0.01  # s, rover motion simulation step

# Warehouse geometry (metres).
AISLE_W = 2.6  # clear aisle width between rack faces
RACK_D = 1.1  # rack depth (back to back racks would be 2x; one row is enough for the look)
PITCH = AISLE_W + RACK_D  # distance between aisle centre lines
CROSS = 3.5  # cross-aisle width at both ends of the racks
RACK_H = 2.65
WALL_H = 6.0
BAY = 2.7  # rack bay width (upright to upright)
UPRIGHT = 0.08
BEAMS = (0.85, 1.70, 2.55)  # beam bottoms; beams are 0.10 m tall
LEVEL_BASES = (0.0, 0.95, 1.80)  # storage level floors (ground, beam 1 top, beam 2 top)
CAM_H = 0.6  # camera height above the floor
WHEEL_R = 0.075  # wheel radius
HALF_TRACK = 0.2  # half the distance between the wheels: rim speed when turning on the spot
PALLET_W, PALLET_H = 1.0, 1.3
PERSON_W, PERSON_H = 0.5, 1.76

FLOOR_VIB = {"ax": 0.035, "ay": 0.035, "az": 0.06, "gx": 0.010, "gy": 0.008, "gz": 0.004}  # RMS at 1 m/s
NOISE = {"a": 0.02, "g": 0.003}  # white sensor noise (m/s^2, rad/s); typical MEMS levels, from memory
CHANNELS = ("ax", "ay", "az", "gx", "gy", "gz")


# --------------------------------------------------------------------------------------------------------------------
# Plan: which recordings carry which anomalies
# --------------------------------------------------------------------------------------------------------------------

def plan_fleet(n_recordings: int, duration_s: float, seed: int) -> list[tuple[str, list[str]]]:
    """Recording names and the anomaly kinds planted in each (empty list = normal), deterministic from the seed.

    About 60 % of the fleet carries anomalies but at least three recordings stay normal (when n >= 4); kinds are
    dealt in the order of KINDS so that five anomalous recordings cover every kind; with 40 s or more, the first
    two anomalous recordings get a second, different kind.
    """
    if n_recordings < 1:
        raise ValueError("n_recordings must be >= 1")
    rng = np.random.default_rng([seed, 0xF1EE7])
    n_anom = max(1, min(n_recordings - 3, math.ceil(0.6 * n_recordings)))
    anomalous = sorted(rng.permutation(n_recordings)[:n_anom].tolist())
    zones = "abcdefghjkmnpqrstuvwxyz"
    plan = []
    for i in range(n_recordings):
        kinds: list[str] = []
        if i in anomalous:
            j = anomalous.index(i)
            kinds.append(KINDS[j % len(KINDS)])
            if duration_s >= 40 and j < 2 and n_anom >= len(KINDS):
                kinds.append(KINDS[(j + 2) % len(KINDS)])
        name = f"rover-{i + 1:02d}-zone-{zones[int(rng.integers(len(zones)))]}"
        plan.append((name, kinds))
    return plan


# --------------------------------------------------------------------------------------------------------------------
# World: racks, walls, gaps, the pallet and the person
# --------------------------------------------------------------------------------------------------------------------

@dataclass
class Leg:
    p0: np.ndarray  # start point (x, y)
    psi: float  # heading along the leg (rad)
    length: float
    kind: str  # "aisle" or "cross"
    turn_after: float  # heading change at the end (rad)
    swerves: list = field(default_factory=list)  # (s0, s1, s2, s3, amplitude): lateral offset profile

    def lateral(self, s: float) -> tuple[float, float]:
        """Lateral offset (m, left positive) and its slope d(offset)/ds at distance s along the leg."""
        off, slope = 0.0, 0.0
        for s0, s1, s2, s3, amp in self.swerves:
            if s0 <= s < s1:
                x = (s - s0) / (s1 - s0)
                off += amp * x * x * (3 - 2 * x)
                slope += amp * 6 * x * (1 - x) / (s1 - s0)
            elif s1 <= s < s2:
                off += amp
            elif s2 <= s < s3:
                x = (s - s2) / (s3 - s2)
                off += amp * (1 - x * x * (3 - 2 * x))
                slope -= amp * 6 * x * (1 - x) / (s3 - s2)
        return off, slope

    def pose(self, s: float) -> tuple[float, float, float]:
        off, slope = self.lateral(s)
        c, sn = math.cos(self.psi), math.sin(self.psi)
        return (self.p0[0] + s * c - off * sn, self.p0[1] + s * sn + off * c, self.psi + math.atan(slope))


@dataclass
class World:
    length: float  # rack length along x
    n_aisles: int
    salt: int
    gaps: list = field(default_factory=list)  # (rack index, x centre, width)
    pallets: list = field(default_factory=list)  # (x, y)
    persons: list = field(default_factory=list)  # dict(x, y0, y1, t0, speed)

    def aisle_y(self, k: int) -> float:
        return k * PITCH

    def rects(self) -> tuple[np.ndarray, np.ndarray]:
        """Axis-aligned blocks (x0, x1, y0, y1) and their kind (0 rack, 1 wall, with the rack index in 10+j)."""
        out, kind = [], []
        for j in range(self.n_aisles + 1):  # rack j lies just below aisle j (and above aisle j-1)
            y1 = j * PITCH - AISLE_W / 2
            y0 = y1 - RACK_D
            cuts = sorted((x - w / 2, x + w / 2) for r, x, w in self.gaps if r == j)
            x = 0.0
            for a, b in cuts + [(self.length, self.length)]:
                if a - x > 0.3:
                    out.append((x, a, y0, y1))
                    kind.append(10 + j)
                x = max(x, b)
        y_lo = -AISLE_W / 2 - RACK_D - 2.0
        y_hi = (self.n_aisles - 1) * PITCH + AISLE_W / 2 + RACK_D + 2.0
        x_lo, x_hi, t = -CROSS, self.length + CROSS, 0.3
        out += [(x_lo - t, x_lo, y_lo - t, y_hi + t), (x_hi, x_hi + t, y_lo - t, y_hi + t),
                (x_lo - t, x_hi + t, y_lo - t, y_lo), (x_lo - t, x_hi + t, y_hi, y_hi + t)]
        kind += [1, 1, 1, 1]
        return np.asarray(out, np.float64), np.asarray(kind, np.int64)


def serpentine_legs(world: World, x0: float) -> list[Leg]:
    """Aisle legs joined by cross-aisle legs; each turn is 90 degrees in place."""
    legs = []
    x, direction = x0, 1
    for k in range(world.n_aisles):
        y = world.aisle_y(k)
        end_x = world.length + CROSS / 2 if direction > 0 else -CROSS / 2
        psi = 0.0 if direction > 0 else math.pi
        turn = math.pi / 2 if direction > 0 else -math.pi / 2
        legs.append(Leg(np.array([x, y]), psi, abs(end_x - x), "aisle", turn))
        legs.append(Leg(np.array([end_x, y]), math.pi / 2, PITCH, "cross", turn))
        x, direction = end_x, -direction
    return legs


# --------------------------------------------------------------------------------------------------------------------
# Motion simulation
# --------------------------------------------------------------------------------------------------------------------

@dataclass
class Motion:
    t: np.ndarray  # (n,) s, uniform SIM_DT grid
    x: np.ndarray
    y: np.ndarray
    heading: np.ndarray  # unwrapped (rad)
    v: np.ndarray  # forward speed (m/s)
    wheel: np.ndarray  # mean wheel rim speed (m/s), drives bearing and floor vibration
    events: list  # dicts: kind, start_s, end_s and kind-specific parameters
    world: World


def person_pos(p: dict, t: float) -> tuple[float, float] | None:
    """Where a crossing person is at time t: across the aisle, then off along the next aisle; None once gone."""
    tau = max(t - p["t0"], 0.0)
    across = abs(p["y1"] - p["y0"])
    t_mid = p["pause_at"] / p["speed"]  # stops mid-aisle for a moment, then walks on
    walked = p["speed"] * (min(tau, t_mid) + max(0.0, tau - t_mid - p["pause"]))
    if walked <= across:
        return p["x"], p["y0"] + math.copysign(walked, p["y1"] - p["y0"])
    if walked > across + 5.0:
        return None
    return p["x"] + p["away"] * (walked - across), p["y1"]


def _smoothstep(x):
    x = np.clip(x, 0.0, 1.0)
    return x * x * (3 - 2 * x)


def simulate(rng: np.random.Generator, duration_s: float, kinds: list[str]) -> Motion:
    """Drive one rover through its patrol with the planned anomalies; returns the 100 Hz trajectory and events."""
    length = float(rng.uniform(40.0, 52.0))
    n_aisles = int(math.ceil(duration_s * 1.6 / length)) + 2
    world = World(length=length, n_aisles=n_aisles, salt=int(rng.integers(1, 2**31 - 1)))
    for j in range(n_aisles + 1):  # a few pass-through gaps in the racks, as real layouts have
        for x in rng.uniform(4, length - 4, size=int(rng.integers(0, 2))):
            world.gaps.append((j, float(x), 1.3))
    # Start early in the aisle when a spatial event is planned, so that there is room ahead for it.
    spatial = any(k in ("pallet", "person", "ramp") for k in kinds)
    legs = serpentine_legs(world, x0=float(rng.uniform(2.0, (0.2 if spatial else 0.55) * length)))

    # Planned start times, spread over the recording; the controller starts spatial events when the rover is in a
    # place where they make sense (an aisle with room ahead), which can be a little later.
    lengths = {"bearing": float(rng.uniform(10, 14)), "bump": 4.0, "pallet": 12.0, "person": 10.0, "ramp": 11.0}
    events = []
    slots = [(0.2, 0.4)] if len(kinds) == 1 else [(0.07, 0.15), (0.5, 0.58)]
    # Spatial events first: early on the rover is in its first aisle with room ahead.
    ordered = sorted(kinds, key=lambda k: k not in ("pallet", "person", "ramp"))
    for kind, (a, b) in zip(ordered, slots):
        t_plan = float(rng.uniform(a, b) * duration_s)
        if kind == "bearing":
            t_plan = min(max(t_plan, 2.0), duration_s - 8.0)  # leaves room for at least 6 s
            dur = min(lengths["bearing"], duration_s - t_plan - 2.0)
            if dur < 6.0:
                continue
            events.append({"kind": kind, "t_plan": t_plan, "state": "active", "start_s": t_plan,
                           "end_s": t_plan + dur})
        else:
            events.append({"kind": kind, "t_plan": t_plan, "state": "pending", "latest": duration_s - lengths[kind]})

    a_brake, a_acc = 0.6, 0.5
    n = int(round((duration_s + 1.0) / SIM_DT)) + 1
    out = np.zeros((n, 5))  # x, y, heading, v, wheel
    leg_i, s = 0, 0.0
    cruise = float(rng.uniform(0.8, 1.3))
    v = cruise
    next_cruise = float(rng.uniform(4, 9))
    next_stop = float(rng.uniform(5, 15))
    mode, until, stop_kind = "drive", 0.0, None
    turn_t0, heading_turn0 = 0.0, 0.0
    active = None  # the one controller event in progress
    for i in range(n):
        t = i * SIM_DT
        leg = legs[min(leg_i, len(legs) - 1)]
        quiet = active is not None or any(e["kind"] == "bearing" and e["start_s"] - 3 <= t <= e["end_s"] + 1
                                          for e in events)
        if mode == "turn":
            T = 3.2  # s per 90-degree turn: peak yaw rate ~1 rad/s
            tau = t - turn_t0
            if tau >= T:
                leg_i += 1
                s, mode = 0.0, "drive"
                leg = legs[min(leg_i, len(legs) - 1)]
                x, y, hd = *leg.pose(0.0)[:2], heading_turn0 + legs[leg_i - 1].turn_after
                omega = 0.0
            else:
                x, y = legs[leg_i].pose(legs[leg_i].length)[:2]
                d = legs[leg_i].turn_after
                hd = heading_turn0 + d * (tau / T - math.sin(2 * math.pi * tau / T) / (2 * math.pi))
                omega = d / T * (1 - math.cos(2 * math.pi * tau / T))
            v = 0.0
            out[i] = (x, y, hd, 0.0, abs(omega) * HALF_TRACK)
            continue

        # -- event triggers --------------------------------------------------------------------------------------
        if active is None and mode == "drive":
            for e in events:
                if e["state"] != "pending" or t < e["t_plan"]:
                    continue
                if t > e["latest"]:
                    e["state"] = "dropped"
                    continue
                room = leg.length - s
                k = e["kind"]
                if k == "bump" and v >= 0.6:
                    e.update(state="active", t_bump=t, start_s=t - 2.0, end_s=t + 2.0)
                    mode = "bump"
                elif k == "pallet" and leg.kind == "aisle" and room >= 14 and v > 0.3:
                    s_p = s + min(11.5, room - 5.5)
                    s_stop = s_p - 0.6 - 1.8
                    leg.swerves.append((s_stop, s_p - 0.6, s_p + 0.6, s_p + 2.4, 0.85))
                    px, py, _ = Leg(leg.p0, leg.psi, leg.length, "aisle", 0.0).pose(s_p)
                    off = -0.15  # pallet a little right of centre, leaving room on the left
                    world.pallets.append((px - off * math.sin(leg.psi), py + off * math.cos(leg.psi)))
                    e.update(state="active", t_trigger=t, s_stop=s_stop, s_end=s_p + 2.4, waited=False)
                elif k == "person" and leg.kind == "aisle" and room >= 11 and v > 0.3:
                    s_c = s + min(7.5, room - 3.5)
                    xc = float(leg.p0[0] + s_c * math.cos(leg.psi))
                    aisle = int(round(leg.p0[1] / PITCH))
                    world.gaps += [(aisle, xc, 1.4), (aisle + 1, xc, 1.4)]
                    side = float(rng.choice([-1.0, 1.0]))  # +1: from the rover's left
                    yc = world.aisle_y(aisle)
                    left = math.cos(leg.psi)  # the rover's left in world y (+1 heading +x, -1 heading -x)
                    y_start = yc + side * left * (AISLE_W / 2 + 0.6 * RACK_D)
                    y_end = yc - side * left * (AISLE_W / 2 + RACK_D + 0.5)
                    p = {"x": xc, "y0": y_start, "y1": y_end, "t0": t + 0.5, "speed": 0.6,
                         "pause_at": abs(yc - y_start), "pause": 2.5,
                         "away": math.cos(leg.psi)}  # then walks off ahead of the rover, out of sight
                    world.persons.append(p)
                    e.update(state="active", t_trigger=t, s_stop=s_c - 2.0, s_cross=s_c, person=p,
                             clear_y=yc - side * left * (AISLE_W / 2 + 0.2), released=None)
                elif k == "ramp" and leg.kind == "aisle" and room >= 1.1 * 11 + 2.5 and v > 0.5:
                    e.update(state="active", start_s=t, end_s=t + 11.0,
                             pitch_deg=float(rng.uniform(7, 9)), roll_deg=float(rng.choice([-1, 1]) * 2.0))
                    cruise = float(np.clip(cruise, 0.7, 1.1))
                if e["state"] == "active":
                    active = e
                    break

        # -- speed control -----------------------------------------------------------------------------------------
        if t >= next_cruise and active is None:
            cruise = float(rng.uniform(0.7, 1.4))
            next_cruise = t + float(rng.uniform(5, 10))
        target = cruise if leg.kind == "aisle" else min(cruise, 0.6)
        stops = [leg.length]
        if mode == "drive" and t >= next_stop:
            if not quiet and s + v * v / (2 * a_brake) + 1.0 < leg.length and leg.kind == "aisle":
                stop_kind = ("random", s + v * v / (2 * a_brake) + 0.05)
            next_stop = t + float(rng.uniform(12, 26))
        if stop_kind is not None:
            stops.append(stop_kind[1])
        if active is not None and active["kind"] == "pallet":
            if not active["waited"]:
                stops.append(active["s_stop"])
            elif s < active["s_end"]:
                target = min(target, 0.5)  # squeezing past slowly
            else:
                active.update(state="done", t_passed=t)
                active = None
        if active is not None and active["kind"] == "person":
            p = active["person"]
            pos = person_pos(p, t)
            clear = pos is None or (pos[1] - active["clear_y"]) * math.copysign(1, p["y1"] - p["y0"]) > 0
            if clear and active["released"] is None:
                active["released"] = t + 1.0
            if active["released"] is None or t < active["released"]:
                stops.append(active["s_stop"])
            elif s > active["s_cross"]:
                active.update(state="done", t_passed=t)
                active = None
        if active is not None and active["kind"] == "ramp" and t > active["end_s"]:
            active["state"] = "done"
            active = None
        if active is not None and active["kind"] == "bump" and mode == "drive" and t > active["t_bump"] + 2.0:
            active["state"] = "done"
            active = None

        if mode == "bump":
            v = max(0.0, v - 4.0 * SIM_DT)
            if v == 0.0:
                mode, until = "wait", t + 2.0
        elif mode == "wait":
            v = 0.0
            if t >= until:
                mode = "drive"
        else:
            d_min = min(st - s for st in stops)
            v_allow = math.sqrt(2 * a_brake * max(d_min, 0.0))
            target = min(target, v_allow)
            v += float(np.clip(target - v, -1.5 * a_brake * SIM_DT, a_acc * SIM_DT))
            v = max(v, 0.0)
            if d_min <= 0.01 and v < 0.08:
                v = 0.0
                s = s + max(d_min, 0.0)
                if active is not None and active["kind"] == "pallet" and not active["waited"] \
                        and abs(active["s_stop"] - s) <= 0.011:
                    active["waited"] = True
                    mode, until = "wait", t + 3.0
                elif stop_kind is not None and abs(stop_kind[1] - s) <= 0.011:
                    mode, until, stop_kind = "wait", t + float(rng.uniform(2, 4)), None
                elif abs(leg.length - s) <= 0.011:
                    mode, turn_t0 = "turn", t
                    heading_turn0 = out[i - 1, 2] if i else leg.psi
                # else: held at the person's stop line until released
        s = min(s + v * SIM_DT, leg.length)
        x, y, hd = leg.pose(s)
        if i and mode != "turn":
            # keep the heading unwrapped and continuous with the turns already made
            hd = out[i - 1, 2] + math.remainder(hd - out[i - 1, 2], 2 * math.pi)
        out[i] = (x, y, hd, v, v)

    # Events still running at the end keep their planned extent; dropped ones are not labelled.
    for e in events:
        if e["kind"] in ("pallet", "person") and e["state"] in ("active", "done"):
            e.setdefault("t_passed", duration_s)
    t = np.arange(n) * SIM_DT
    return Motion(t=t, x=out[:, 0], y=out[:, 1], heading=out[:, 2], v=out[:, 3], wheel=out[:, 4],
                  events=[e for e in events if e["state"] in ("active", "done")], world=world)


def attitude(motion: Motion, t: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Pitch (nose up +) and roll (rad) at times t from the ramp events."""
    pitch = np.zeros_like(t)
    roll = np.zeros_like(t)
    for e in motion.events:
        if e["kind"] != "ramp":
            continue
        tau = t - e["start_s"]
        shape = _smoothstep(tau / 3.0) - _smoothstep((tau - 8.0) / 3.0)
        pitch += math.radians(e["pitch_deg"]) * shape
        roll += math.radians(e["roll_deg"]) * shape
    return pitch, roll


def camera_shake(motion: Motion, t: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Image shake after a bump: dx, dy (fractions of the image width) and rotation (rad), decaying in ~0.5 s."""
    dx, dy, rot = (np.zeros_like(t) for _ in range(3))
    for e in motion.events:
        if e["kind"] != "bump":
            continue
        tau = t - e["t_bump"]
        env = np.where(tau >= 0, np.exp(-np.clip(tau, 0, None) / 0.15), 0.0)
        dx += 0.025 * env * np.sin(2 * np.pi * 5.5 * tau)
        dy += 0.018 * env * np.sin(2 * np.pi * 6.5 * tau + 1.0)
        rot += math.radians(2.5) * env * np.sin(2 * np.pi * 4.5 * tau + 0.5)
    return dx, dy, rot


# --------------------------------------------------------------------------------------------------------------------
# IMU
# --------------------------------------------------------------------------------------------------------------------

def imu_times(rng: np.random.Generator, duration_s: float) -> np.ndarray:
    """Jittery ~200 Hz sample times starting at 0, with single dropped samples and short dropped runs (< 0.1 s)."""
    n = int(duration_s / IMU_DT) + 2
    t = np.concatenate([[0.0], np.cumsum(rng.uniform(IMU_DT - IMU_JITTER, IMU_DT + IMU_JITTER, n))])
    t = t[t <= duration_s]
    keep = np.ones(len(t), bool)
    n_single = max(1, int(round(0.1 * duration_s)))
    n_runs = max(1, int(round(0.05 * duration_s)))
    for i in rng.integers(10, len(t) - 10, n_single):
        keep[i] = False
    for i in rng.integers(10, len(t) - 40, n_runs):
        keep[i:i + int(rng.integers(3, 18))] = False  # at most 17 samples ~ 85 ms
    return t[keep]


def _band_noise(rng, n, fs, lo, hi):
    """Unit-RMS band-limited Gaussian noise (Butterworth band-pass, zero phase)."""
    sos = signal.butter(4, [lo, hi], btype="band", fs=fs, output="sos")
    x = signal.sosfiltfilt(sos, rng.standard_normal(n))
    return x / (x.std() + 1e-12)


def synth_imu(rng: np.random.Generator, motion: Motion, t_imu: np.ndarray) -> np.ndarray:
    """IMU samples (n, 6): ax ay az (m/s^2, specific force) gx gy gz (rad/s) at the given true times."""
    ts = motion.t
    # Kinematics: a short Gaussian smoothing makes accelerations continuous (a real drive train has no jerk steps).
    v = ndimage.gaussian_filter1d(motion.v, 0.12 / SIM_DT)
    a_long = np.gradient(v, SIM_DT)
    hd = ndimage.gaussian_filter1d(motion.heading, 0.05 / SIM_DT)
    omega = np.gradient(hd, SIM_DT)
    pitch, roll = attitude(motion, ts)
    pitch = pitch + 0.006 * ndimage.gaussian_filter1d(a_long, 0.15 / SIM_DT)  # suspension squat
    pitch_rate, roll_rate = np.gradient(pitch, SIM_DT), np.gradient(roll, SIM_DT)
    wheel = ndimage.gaussian_filter1d(motion.wheel, 0.1 / SIM_DT)

    def at(x):
        return np.interp(t_imu, ts, x)

    p, r = at(pitch), at(roll)
    acc = np.stack([at(a_long) + G * np.sin(p),
                    at(v * omega) - G * np.cos(p) * np.sin(r),
                    G * np.cos(p) * np.cos(r)], axis=1)
    gyr = np.stack([at(roll_rate), -at(pitch_rate), at(omega)], axis=1)  # nose-up is a negative rotation about +y
    imu = np.concatenate([acc, gyr], axis=1)

    # Floor-texture vibration, proportional to wheel speed, on a 1 kHz grid then sampled at the IMU times.
    fs = 1000.0
    tf = np.arange(0.0, ts[-1], 1 / fs)
    roughness = float(rng.uniform(0.8, 1.2))
    speed = np.clip(np.interp(t_imu, ts, wheel), 0, 1.6)
    for c, ch in enumerate(CHANNELS):
        vib = np.interp(t_imu, tf, _band_noise(rng, len(tf), fs, 6.0, 45.0))
        imu[:, c] += roughness * FLOOR_VIB[ch] * speed * vib

    for e in motion.events:
        if e["kind"] == "bearing":
            # A rattle whose frequency wanders in 14-18 Hz, amplitude-modulated once per wheel turn.
            f_inst = 16.0 + 1.5 * np.sin(2 * np.pi * tf / 7.0 + float(rng.uniform(0, 2 * np.pi)))
            phase = np.interp(t_imu, tf, 2 * np.pi * np.cumsum(f_inst) / fs)
            wheel_angle = np.interp(t_imu, tf, np.cumsum(np.interp(tf, ts, wheel)) / fs / WHEEL_R)  # rad
            env = (_smoothstep((t_imu - e["start_s"]) / 0.6) - _smoothstep((t_imu - e["end_s"] + 0.6) / 0.6))
            amp = env * np.clip(speed / 0.9, 0, 1.3) * (0.7 + 0.3 * np.cos(wheel_angle))
            for c, (gain, ph) in enumerate([(0.22, 0.7), (0.26, 1.9), (0.38, 0.0), (0.030, 2.4), (0.022, 0.3),
                                            (0.006, 1.1)]):
                imu[:, c] += gain * amp * np.sin(phase + ph)
        elif e["kind"] == "bump":
            tau = t_imu - e["t_bump"]
            on = tau >= 0
            tau_c = np.clip(tau, 0, None)
            k = float(rng.uniform(0.85, 1.15))
            env_a = np.where(on, np.exp(-tau_c / 0.07), 0.0) * k
            env_g = np.where(on, np.exp(-tau_c / 0.12), 0.0) * k
            sgn = float(rng.choice([-1.0, 1.0]))  # which side hit the rack
            imu[:, 0] += -22.0 * env_a * np.cos(2 * np.pi * 9.0 * tau)
            imu[:, 1] += sgn * 14.0 * env_a * np.sin(2 * np.pi * 11.0 * tau + 0.3)
            imu[:, 2] += 9.0 * env_a * np.sin(2 * np.pi * 13.0 * tau)
            imu[:, 3] += sgn * 1.2 * env_g * np.sin(2 * np.pi * 7.0 * tau)
            imu[:, 4] += 0.8 * env_g * np.sin(2 * np.pi * 6.0 * tau + 0.8)
            imu[:, 5] += sgn * 1.6 * np.where(on, np.exp(-tau_c / 0.15), 0.0) * k * np.sin(2 * np.pi * 5.0 * tau + 0.5)

    bias = np.concatenate([rng.uniform(-0.04, 0.04, 3), rng.uniform(-0.002, 0.002, 3)])
    noise = np.concatenate([np.full(3, NOISE["a"]), np.full(3, NOISE["g"])])
    imu += bias + noise * rng.standard_normal(imu.shape)
    return imu


def write_imu_csv(path: Path, t: np.ndarray, imu: np.ndarray) -> None:
    """Limited precision keeps the files small: 0.1 ms, 1 mm/s^2, 1 mrad/s. The quantisation noise (step/sqrt(12))
    stays far below the sensor noise: 0.0003 vs 0.02 m/s^2 and 0.0003 vs 0.003 rad/s."""
    cols = [np.round(t, 4)] + [np.round(imu[:, c], 3) + 0.0 for c in range(6)]  # +0.0: no "-0.000"
    np.savetxt(path, np.column_stack(cols), fmt=["%.4f"] + ["%.3f"] * 6,
               delimiter=",", header="t," + ",".join(CHANNELS), comments="")


# --------------------------------------------------------------------------------------------------------------------
# Camera rendering
# --------------------------------------------------------------------------------------------------------------------

def _hash01(*keys) -> np.ndarray:
    """Deterministic pseudo-random numbers in [0, 1) from integer arrays (a 64-bit multiply-xorshift mix)."""
    h = np.uint64(0x9E3779B97F4A7C15)
    for k in keys:
        h = (h ^ np.asarray(k).astype(np.uint64)) * np.uint64(0xBF58476D1CE4E5B9)
        h = h ^ (h >> np.uint64(29))
    return (h >> np.uint64(40)).astype(np.float32) / np.float32(2**24)


def _pack_rgb(rgb: np.ndarray) -> np.ndarray:
    """(..., 3) colours 0..255 -> (...) uint32 whose little-endian bytes are R, G, B, 0."""
    c = np.clip(np.rint(rgb), 0, 255).astype(np.uint32)
    return (c[..., 0] | (c[..., 1] << 8) | (c[..., 2] << 16)).astype("<u4")


BOX_COLOURS = np.array([[168, 124, 76], [150, 110, 66], [186, 146, 96], [132, 96, 60], [196, 170, 120],
                        [70, 100, 150], [200, 200, 196], [120, 60, 50], [60, 110, 80]], np.float32)
BOX_P = np.array([0.2, 0.18, 0.16, 0.12, 0.1, 0.08, 0.08, 0.04, 0.04])


class Renderer:
    """Renders the rover's forward view of the warehouse.

    Walls are found per image column by intersecting the column's ray with every axis-aligned block (slab method,
    vectorised over blocks x columns). Their colours come from a texture atlas of vertical texel columns built once
    per world (one per rack slot and variant: plain, carton seam, carton label, empty; uprights, rack ends, walls),
    indexed per pixel by height. Floor pixels are projected onto the ground plane and read from a floor texture
    baked once (concrete, seams, lane marks, light pools). The pallet and the person are camera-facing billboards
    tested against the column depth. Distance fog on everything.
    """

    NZ = 384  # texels per texture column over 0..WALL_H (1.6 cm)
    FLOOR_RES = 0.03  # m per floor texel

    def __init__(self, world: World, size: tuple[int, int], exposure: float):
        self.world = world
        self.w, self.h = size
        self.f = 0.62 * self.w  # ~77 degree horizontal field of view
        self.rects, self.kinds = world.rects()
        self.rects32 = self.rects.astype(np.float32)
        self.heights = np.where(self.kinds == 1, WALL_H, RACK_H).astype(np.float32)
        self.exposure = np.float32(exposure)
        self.fog = np.array([60, 60, 60], np.float32)
        self._build_atlas()
        self._build_floor()

    # -- textures ------------------------------------------------------------------------------------------------
    def _build_atlas(self):
        nz = self.NZ
        z = (np.arange(nz, dtype=np.float32) + 0.5) * (WALL_H / nz)
        beam = np.zeros(nz, bool)
        for b in BEAMS:
            beam |= (z >= b) & (z < b + 0.10)
        level = (z >= LEVEL_BASES[1]).astype(np.int64) + (z >= LEVEL_BASES[2]).astype(np.int64)
        zs = z - np.asarray(LEVEL_BASES, np.float32)[level]
        cols = []

        def add(c):
            cols.append(np.asarray(c, np.float32))
            return len(cols) - 1

        wall = np.empty((nz, 3), np.float32)
        wall[:] = (150, 148, 142)
        wall[z < 0.35] = (112, 110, 104)
        self.T_WALL = add(wall)
        self.T_WALL_SEAM = add(np.full((nz, 3), (112, 110, 104), np.float32))
        up = np.empty((nz, 3), np.float32)
        up[:] = (34, 64, 140)
        self.T_UPRIGHT = add(up)
        end = up.copy()
        end[(z > 1.1) & (z < 1.35)] = (215, 185, 40)
        self.T_END = add(end)
        empty = np.empty((nz, 3), np.float32)
        empty[:] = (38, 38, 44)  # the dark inside of an empty slot
        empty[beam] = (214, 112, 24)
        self.T_GAP = add(empty)
        # One group of 3 variants (plain, seam, label) per rack, bay and slot.
        n_racks = self.world.n_aisles + 1
        self.n_bays = int(math.ceil(self.world.length / BAY)) + 1
        self.slot_base = np.zeros((n_racks, self.n_bays, 2), np.int64)
        for j in range(n_racks):
            for b in range(self.n_bays):
                for sl in range(2):
                    self.slot_base[j, b, sl] = len(cols)
                    r1 = _hash01(np.arange(3) + 10 * (j + 1), b + 100000, sl, self.world.salt)
                    r2 = _hash01(np.arange(3) + 10 * (j + 1), b + 100000, sl, self.world.salt + 1)
                    present = r1 < 0.82
                    stack_h = 0.35 + 0.4 * r2
                    ci = np.searchsorted(np.cumsum(BOX_P), (r1 / 0.82).clip(0, 0.999))
                    plain = empty.copy()
                    zb = zs - 0.12
                    box = present[level] & (zb >= 0) & (zb < stack_h[level]) & ~beam
                    wood = present[level] & (zs < 0.12) & ~beam
                    plain[wood] = (140, 104, 62)
                    plain[box] = BOX_COLOURS[ci[level[box]]]
                    hseam = box & (np.mod(zb, 0.3) < 0.02)
                    plain[hseam] *= 0.7
                    seam = plain.copy()
                    seam[box] = BOX_COLOURS[ci[level[box]]] * 0.7
                    label = plain.copy()
                    lab = box & (np.mod(zb, 0.3) > 0.08) & (np.mod(zb, 0.3) < 0.16)
                    label[lab] = (226, 226, 220)
                    for c in (plain, seam, label):
                        add(c)
        self.atlas = _pack_rgb(np.stack(cols)).reshape(-1)  # (n_tex * NZ,) packed RGB

    def _build_floor(self):
        wd = self.world
        res = self.FLOOR_RES
        self.fx0 = -CROSS - 0.5
        self.fy0 = -AISLE_W / 2 - RACK_D - 2.5
        nx = int(math.ceil((wd.length + 2 * CROSS + 1.0) / res))
        ny = int(math.ceil(((wd.n_aisles - 1) * PITCH + AISLE_W + 2 * RACK_D + 5.0) / res))
        X = (self.fx0 + (np.arange(nx, dtype=np.float32) + 0.5) * res)[None, :]
        Y = (self.fy0 + (np.arange(ny, dtype=np.float32) + 0.5) * res)[:, None]
        cell = _hash01(np.floor(X).astype(np.int64) + 1000, np.floor(Y).astype(np.int64) + 1000, wd.salt)
        base = np.float32(116) + 10 * cell
        tex = np.empty((ny, nx, 3), np.float32)
        tex[:] = (base[..., None] * np.array([1.0, 1.0, 0.96], np.float32))
        seam = (np.mod(X, 4.0) < 0.03) | (np.mod(Y, 4.0) < 0.03)
        tex[np.broadcast_to(seam, (ny, nx))] *= 0.85
        in_aisle = (X > 0) & (X < wd.length)
        yl = Y - np.round(Y / PITCH) * PITCH
        edge = in_aisle & (np.abs(np.abs(yl) - 1.05) < 0.04)
        tex[edge] = (205, 172, 40)
        dash = in_aisle & (np.abs(yl) < 0.04) & (np.mod(X, 1.5) < 0.7)
        tex[dash] = (214, 214, 206)
        stop_line = ((np.abs(X + 0.2) < 0.08) | (np.abs(X - wd.length - 0.2) < 0.08)) & (np.abs(yl) < 1.05)
        tex[stop_line] = (205, 172, 40)
        tex *= (1.0 + 0.12 * np.cos(X * np.float32(2 * np.pi / 5.0)))[..., None]  # overhead light rows
        self.floor_tex = _pack_rgb(tex).reshape(-1)  # (ny * nx,) packed RGB
        self.fnx, self.fny = nx, ny

    def ceiling_colour(self, ch: int) -> np.ndarray:
        """Packed dark-grey gradient, one value per row (ch, 1)."""
        g = np.round(44 + 16 * np.arange(ch) / ch)[:, None, None] * np.ones(3)
        return _pack_rgb(g)

    # -- frames ----------------------------------------------------------------------------------------------------
    def frame(self, t: float, x: float, y: float, psi: float, pitch: float, roll: float,
              shake: tuple[float, float, float]) -> tuple[np.ndarray, dict]:
        """One RGB uint8 frame and the number of pixels covered by each kind of sprite."""
        w, h = self.w, self.h
        rot = roll + shake[2]
        margin = int(math.ceil((w + h) * 0.5 * abs(math.sin(rot)))) + 1 if abs(rot) > 1e-3 else 0
        cw, ch = w + 2 * margin, h + 2 * margin
        cx = cw / 2 - 0.5 + shake[0] * w
        cy = ch / 2 - 0.5 + self.f * math.tan(pitch) + shake[1] * w
        img, counts = self._render(t, x, y, psi, cx, cy, cw, ch)
        if margin:
            img = self._rotate(img, rot, margin)
        return np.clip(img + 0.5, 0, 255).astype(np.uint8), counts

    def _rotate(self, img, angle, m):
        h, w = self.h, self.w
        yy, xx = np.mgrid[0:h, 0:w].astype(np.float32)
        yc, xc = yy - (h - 1) / 2, xx - (w - 1) / 2
        c, s = math.cos(angle), math.sin(angle)
        sx = np.rint(c * xc + s * yc + (w - 1) / 2 + m).astype(np.intp)
        sy = np.rint(-s * xc + c * yc + (h - 1) / 2 + m).astype(np.intp)
        np.clip(sx, 0, img.shape[1] - 1, out=sx)
        np.clip(sy, 0, img.shape[0] - 1, out=sy)
        return img[sy, sx]

    def _columns(self, px, py, dx, dy):
        """Nearest block hit by each column's ray: depth, hit kind, along-face coordinate, x-face flag."""
        near = (np.maximum(np.maximum(self.rects[:, 0] - px, px - self.rects[:, 1]), 0) ** 2
                + np.maximum(np.maximum(self.rects[:, 2] - py, py - self.rects[:, 3]), 0) ** 2) < 60.0 ** 2
        near |= self.kinds == 1
        R = self.rects32[near]
        kinds = self.kinds[near]
        idx = np.float32(1.0) / np.where(np.abs(dx) < 1e-6, np.float32(1e-6), dx)
        idy = np.float32(1.0) / np.where(np.abs(dy) < 1e-6, np.float32(1e-6), dy)
        tx0 = (R[:, 0:1] - np.float32(px)) * idx
        tx1 = (R[:, 1:2] - np.float32(px)) * idx
        ty0 = (R[:, 2:3] - np.float32(py)) * idy
        ty1 = (R[:, 3:4] - np.float32(py)) * idy
        txn, txf = np.minimum(tx0, tx1), np.maximum(tx0, tx1)
        tyn, tyf = np.minimum(ty0, ty1), np.maximum(ty0, ty1)
        tn = np.maximum(txn, tyn)
        tf = np.minimum(txf, tyf)
        tn = np.where((tf >= tn) & (tn > 0.05), tn, np.float32(np.inf))
        k = np.argmin(tn, axis=0)
        cols = np.arange(len(dx))
        depth = tn[k, cols]
        depth = np.where(np.isfinite(depth), depth, np.float32(80.0))
        xface = txn[k, cols] >= tyn[k, cols]
        hx = np.float32(px) + depth * dx
        hy = np.float32(py) + depth * dy
        return depth, kinds[k], np.where(xface, hy, hx), xface

    def _texture_rows(self, kind, along, xface):
        """Atlas row per column."""
        tex = np.where(np.mod(along, 4.0) < 0.05, self.T_WALL_SEAM, self.T_WALL)
        rack = kind >= 10
        j = np.clip(kind - 10, 0, self.slot_base.shape[0] - 1)
        bay = np.clip(np.floor(along / BAY).astype(np.int64), 0, self.n_bays - 1)
        ab = along - bay * BAY
        half = (BAY - UPRIGHT) / 2
        slot = (ab >= UPRIGHT + half).astype(np.int64)
        a_s = ab - UPRIGHT - slot * half
        m = np.mod(a_s, 0.42)
        variant = np.where(m < 0.025, 1, np.where((m > 0.12) & (m < 0.26), 2, 0))
        face = self.slot_base[j, bay, slot] + variant
        face = np.where((a_s > 0.05) & (a_s < half - 0.05), face, self.T_GAP)
        face = np.where(ab < UPRIGHT, self.T_UPRIGHT, face)
        face = np.where(xface, self.T_END, face)
        return np.where(rack, face, tex)

    def _render(self, t, px, py, psi, cx, cy, cw, ch):
        f = np.float32(self.f)
        u = np.arange(cw, dtype=np.float32)
        lat = -(u - np.float32(cx)) / f
        c, s = np.float32(math.cos(psi)), np.float32(math.sin(psi))
        dx = c - lat * s
        dy = s + lat * c
        depth, kind, along, xface = self._columns(px, py, dx, dy)
        heights = np.where(kind == 1, np.float32(WALL_H), np.float32(RACK_H))
        cyf = np.float32(cy)
        top = cyf - f * (heights - CAM_H) / depth
        bot = cyf + f * CAM_H / depth
        rows = np.arange(ch, dtype=np.float32)[:, None]

        # Colours are gathered as packed 32-bit RGB (one element per pixel), then shaded once in float:
        # colour * gain + fog * haze, with gain and haze per column for walls and per row for the floor.
        zbin = ((CAM_H + (cyf - rows) * (depth / f)) * np.float32(self.NZ / WALL_H)).astype(np.int64)
        np.clip(zbin, 0, self.NZ - 1, out=zbin)
        zbin += (self._texture_rows(kind, along, xface) * self.NZ)[None, :]
        wall = (rows >= top) & (rows <= bot)
        packed = np.where(wall, np.take(self.atlas, zbin), self.ceiling_colour(ch))
        fogk = np.exp(-depth / np.float32(26.0))
        light = (1.0 + 0.12 * np.cos(along * np.float32(2 * np.pi / 5.0))) * np.where(xface, 0.85, 1.0)
        gain = np.where(wall, (light * fogk * self.exposure)[None, :], np.float32(1.0))
        haze = np.where(wall, (1 - fogk)[None, :], np.float32(0.0))

        # floor: ground-plane texel under each pixel below the horizon
        r0 = max(int(math.floor(cy)) + 1, 0)
        if r0 < ch:
            fr = rows[r0:]
            tfl = f * CAM_H / (fr - cyf)
            ix = ((np.float32(px) + tfl * dx[None, :] - self.fx0) * np.float32(1 / self.FLOOR_RES)).astype(np.int64)
            iy = ((np.float32(py) + tfl * dy[None, :] - self.fy0) * np.float32(1 / self.FLOOR_RES)).astype(np.int64)
            np.clip(ix, 0, self.fnx - 1, out=ix)
            np.clip(iy, 0, self.fny - 1, out=iy)
            iy *= self.fnx
            iy += ix
            below = fr > bot[None, :]
            packed[r0:] = np.where(below, np.take(self.floor_tex, iy), packed[r0:])
            fk = np.exp(-tfl / np.float32(26.0))
            gain[r0:] = np.where(below, fk * self.exposure, gain[r0:])
            haze[r0:] = np.where(below, 1 - fk, haze[r0:])
        # Shade all four bytes (contiguous, faster than the strided RGB view); the fog is grey, one value.
        img = packed.view(np.uint8).reshape(ch, cw, 4).astype(np.float32)
        img *= gain[..., None]
        img += (haze * self.fog[0])[..., None]
        img = img[..., :3]

        counts = {"pallet": 0, "person": 0}
        for qx, qy in self.world.pallets:
            counts["pallet"] += self._sprite(img, "pallet", t, qx, qy, px, py, c, s, cx, cy, depth)
        for p in self.world.persons:
            pos = person_pos(p, t)
            if pos is not None and t >= p["t0"] - 1.0:
                counts["person"] += self._sprite(img, "person", t, pos[0], pos[1], px, py, c, s, cx, cy, depth)
        return img, counts

    def _sprite(self, img, kind, t, qx, qy, px, py, c, s, cx, cy, depth):
        """Draw a camera-facing billboard standing on the floor at (qx, qy); returns the pixels it covers."""
        f = self.f
        ddx, ddy = qx - px, qy - py
        fwd = ddx * float(c) + ddy * float(s)
        lat = -ddx * float(s) + ddy * float(c)
        half, height = (PALLET_W / 2, PALLET_H) if kind == "pallet" else (PERSON_W / 2, PERSON_H)
        zd = fwd - (0.6 if kind == "pallet" else 0.1)  # depth of the face nearest the camera
        if zd < 0.3:
            return 0
        ch, cw = img.shape[:2]
        uc = cx - f * lat / zd
        u0, u1 = int(math.floor(uc - f * half / zd)), int(math.ceil(uc + f * half / zd))
        v0 = int(math.floor(cy - f * (height - CAM_H) / zd))
        v1 = int(math.ceil(cy + f * CAM_H / zd))
        cu0, cu1, cv0, cv1 = max(u0, 0), min(u1, cw), max(v0, 0), min(v1, ch)
        if cu0 >= cu1 or cv0 >= cv1:
            return 0
        uu = np.arange(cu0, cu1, dtype=np.float32)
        vv = np.arange(cv0, cv1, dtype=np.float32)[:, None]
        an = (uu - u0) / max(u1 - u0, 1)  # 0..1 across the sprite
        z = CAM_H + (cy - vv) * zd / f  # height of each row on the sprite plane
        visible = (depth[cu0:cu1] > zd)[None, :]
        if kind == "pallet":
            mask = np.broadcast_to(visible, (len(vv), len(uu))).copy()
            col = np.empty(mask.shape + (3,), np.float32)
            col[:] = (158, 112, 64)
            seam = (np.mod(an * PALLET_W, 0.33) < 0.02) | (np.mod(z - 0.15, 0.29) < 0.02)
            col[np.broadcast_to(seam, mask.shape)] = (112, 78, 44)
            base = np.broadcast_to(z < 0.15, mask.shape)
            gaps = np.broadcast_to((np.mod(an * 3.0, 1.0) > 0.25) & (z > 0.03), mask.shape)
            col[base] = (124, 92, 54)
            col[base & gaps] = (40, 32, 26)
            sheen = np.broadcast_to((z > 0.15) & (np.abs(an - 0.7) < 0.04), mask.shape)
            col[sheen] = col[sheen] * 0.6 + 90
        else:
            swing = 0.06 * math.sin(2 * math.pi * 1.7 * t)
            legs = (z < 0.86) & ((np.abs(an - (0.32 + swing)) < 0.12) | (np.abs(an - (0.68 - swing)) < 0.12))
            torso = (z >= 0.84) & (z < 1.46) & (an > 0.12) & (an < 0.88)
            arms = (z >= 0.9) & (z < 1.44) & ((an <= 0.12) | (an >= 0.88))
            neck = (z >= 1.46) & (z < 1.52) & (np.abs(an - 0.5) < 0.08)
            head = (z >= 1.52) & (z < 1.70) & (np.abs(an - 0.5) < 0.15)
            hat = (z >= 1.66) & (z < PERSON_H) & (np.abs(an - 0.5) < 0.18)
            shape = legs | torso | arms | neck | head | hat
            mask = shape & visible
            col = np.empty(mask.shape + (3,), np.float32)
            col[:] = (40, 50, 92)  # trousers
            col[np.broadcast_to(z < 0.09, mask.shape)] = (24, 22, 20)  # boots
            col[np.broadcast_to(torso, mask.shape)] = (250, 128, 20)  # hi-vis vest
            stripes = torso & (((z > 1.04) & (z < 1.10)) | ((z > 1.26) & (z < 1.32)))
            col[np.broadcast_to(stripes, mask.shape)] = (222, 222, 214)
            col[np.broadcast_to(arms, mask.shape)] = (110, 112, 124)
            col[np.broadcast_to(neck | head, mask.shape)] = (196, 150, 120)
            col[np.broadcast_to(hat, mask.shape)] = (240, 214, 40)
        fogk = np.float32(math.exp(-fwd / 26.0))
        block = img[cv0:cv1, cu0:cu1]
        block[mask] = col[mask] * (fogk * self.exposure) + self.fog * (1 - fogk)
        return int(mask.sum())


def frame_times(rng: np.random.Generator, duration_s: float, fps: float) -> np.ndarray:
    """True capture times: nominal 1/fps grid with +-1.5 ms jitter (first frame exactly at 0), ~1 drop per 30 s."""
    n = int(math.floor(duration_s * fps + 1e-9))
    t = np.arange(n) / fps + np.concatenate([[0.0], rng.uniform(-0.0015, 0.0015, n - 1)])
    keep = np.ones(n, bool)
    n_drop = int(duration_s // 30)
    if n > 20 and n_drop:
        keep[rng.integers(5, n - 5, n_drop)] = False
    return t[keep]


def render_video(path: Path, motion: Motion, t_frames: np.ndarray, size: tuple[int, int], exposure: float,
                 fps: float, codec: str = "libx264") -> dict:
    """Render and encode the camera stream; returns per-sprite visible pixel counts per frame."""
    from fleetsift.demo.video import write_video

    renderer = Renderer(motion.world, size, exposure)
    heading = np.interp(t_frames, motion.t, motion.heading)
    xs, ys = np.interp(t_frames, motion.t, motion.x), np.interp(t_frames, motion.t, motion.y)
    pitch, roll = attitude(motion, t_frames)
    sdx, sdy, srot = camera_shake(motion, t_frames)
    counts = {"pallet": np.zeros(len(t_frames), np.int64), "person": np.zeros(len(t_frames), np.int64)}

    def frames():
        for i, t in enumerate(t_frames):
            img, cnt = renderer.frame(float(t), float(xs[i]), float(ys[i]), float(heading[i]), float(pitch[i]),
                                      float(roll[i]), (float(sdx[i]), float(sdy[i]), float(srot[i])))
            for k, n in cnt.items():
                counts[k][i] = n
            yield img

    # MPEG-4 Part 2 caps the time-base denominator at 65535; H.264 takes the 90 kHz MPEG clock.
    tb = CAMERA_TIME_BASE if codec != "mpeg4" else 30000
    pts = np.round((t_frames + CAMERA_OFFSET_S) * tb).astype(np.int64)
    # mbtree=0: with x264's macroblock-tree rate control the bitstream changed from run to run for the same
    # frames (measured with this FFmpeg build: it depended on unrelated memory allocations); without it the output
    # is byte-identical. Costs a few per cent of bitrate.
    options = ({"crf": "30", "preset": "veryfast", "g": "75", "x264-params": "mbtree=0"} if codec == "libx264"
               else {"qscale": "6"})
    write_video(path, frames(), fps=fps, codec=codec, pts=pts.tolist(), time_base=Fraction(1, tb), options=options)
    return counts


# --------------------------------------------------------------------------------------------------------------------
# Labels, profile, fleet
# --------------------------------------------------------------------------------------------------------------------

VISIBLE_SHARE = {"pallet": 0.01, "person": 0.003}  # share of the image a sprite must cover to count as "in view"


def event_intervals(motion: Motion, t_frames: np.ndarray, counts: dict, size: tuple[int, int],
                    duration_s: float) -> list[tuple[float, float, str]]:
    """Anomalous intervals (start, end, kind) in seconds from the first IMU sample.

    Visual events span the frames where the pallet or person covers enough of the image (measured on the rendered
    frames themselves), joined with the rover's reaction (stop, wait, pass); the bump is [t-2, t+2] so that every
    4 s window whose centre lies inside contains the shock.
    """
    out = []
    for e in motion.events:
        k = e["kind"]
        if k in ("pallet", "person"):
            seen = counts[k] >= VISIBLE_SHARE[k] * size[0] * size[1]
            if not seen.any():
                continue
            start = float(t_frames[np.argmax(seen)])
            end = float(t_frames[len(seen) - 1 - np.argmax(seen[::-1])])
            # joined with the rover's reaction: waiting for the person, or squeezing past the pallet
            start = min(start, e["t_trigger"]) if k == "person" else start
            end = max(end, (e.get("released") or end) if k == "person" else e["t_passed"])
            out.append((start, end, k))
        else:
            out.append((float(e["start_s"]), float(e["end_s"]), k))
    return [(max(0.0, a), min(duration_s, b), k) for a, b, k in sorted(out)]


PROFILE_TOML = """\
# Sensor profile for the demo fleet of warehouse inventory rovers (see README.md in this folder).
[windowing]
rate_hz = 50.0        # common clock rate (Hz)
window_s = 4.0        # window length (s)
hop_s = 2.0           # hop between window starts (s)
max_gap_s = 0.25      # a window straddling a gap in any stream longer than this is left unscored

[descriptor]
kind = "covariance"   # covariance | rbf (kernel between channels) | lagged (covariance of the delay embedding)
shrinkage = "ledoit_wolf"  # estimator of covariance and lagged: ledoit_wolf (Ledoit & Wolf 2004) | oas (Chen 2010)
include_mean = true   # Gaussian embedding of window mean + covariance into SPD(c+1) (Calvo & Oller 1990)
lags = 3              # lagged only
ridge = "auto"        # noise floor added to every window covariance, in standardised units; "auto": the smallest
                      # eigenvalue of the baseline's channel correlation matrix, clipped to [0.05, 1]
per_stream = true     # one descriptor per stream (imu, camera), combined by the largest score; false: one for all

[scoring]
metric = "riemann"    # primary metric: riemann | logeuclid | euclid
method = "knn"        # knn: k-th nearest neighbour distance | density: local outlier factor |
                      # frechet_mean: distance to the references' Frechet mean
k = 3                 # neighbours
knn_unit = "recording"  # recording: the nearest window of each of the k nearest recordings (a behaviour is normal
                        # only where k recordings show it) | window: the k nearest windows
knn_stat = "kth"      # kth | mean (of the k distances)
exclusion_s = 30.0    # same-recording neighbours within this many seconds never count
trim_fraction = 0.1   # a first night's batch baseline: drop this share of highest-scoring windows and refit
threshold_c = 3.0     # c: flag a window whose distance exceeds median + c x robust sigma of the references'
                      # leave-one-out distances (robust sigma = 1.4826 x MAD), i.e. whose robust z exceeds c;
                      # c = 3 is about three standard deviations
n_top_channels = 3    # how many channels each flagged window names (its top channels)

[baseline]
source = "history"    # history: earlier nights' unflagged windows (tonight's batch on a first night) |
                      # batch: tonight's batch, robustly trimmed | recordings: the recordings listed below
recordings = []       # recording names, for source = "recordings"
history_nights = 7    # committed nights the references come from, newest first
max_references = 4000 # cap on reference windows, evenly subsampled
history_max_score = 2.0  # a window joins the history only with a score at most this (and none flagged near it)

[streams.imu]
kind = "table"
file = "imu.csv"
time_column = "t"
time_unit = "s"
channels = ["ax", "ay", "az", "gx", "gy", "gz"]   # accel m/s^2 (x forward, y left, z up), gyro rad/s
clock_offset_s = 0.0
units = { ax = "m/s^2", ay = "m/s^2", az = "m/s^2", gx = "rad/s", gy = "rad/s", gz = "rad/s" }  # on the report's traces
[streams.imu.calibration]
ax = { bias = 0.0, scale = 1.0 }   # calibrated = (raw - bias) * scale
ay = { bias = 0.0, scale = 1.0 }
az = { bias = 0.0, scale = 1.0 }
gx = { bias = 0.0, scale = 1.0 }
gy = { bias = 0.0, scale = 1.0 }
gz = { bias = 0.0, scale = 1.0 }

[streams.camera]
kind = "video"
file = "camera.mp4"
clock_offset_s = -0.35    # the camera clock runs 0.35 s ahead of the IMU clock
sample_hz = 5.0           # frames taken for embedding per second (by pts)
backbone = "efficientnet_lite0"
weights = ""
pca_dim = 6                # principal components of the embeddings kept as channels (plus the PCA residual)
image_size = 224
threads = 2
skip_threshold = 0.006    # a frame this close to the last embedded one (largest thumbnail pixel change) reuses it
runtime = "onnxruntime"   # or "torch"; the ONNX export is cached in the store by weights fingerprint
precision = "float32"     # "int8" only where it passes the accuracy guard (README, Performance)
"""


def _clean_old(out: Path, keep: set[str]) -> None:
    """Remove recording folders of an earlier generation that this one does not rewrite (only our own files)."""
    for d in out.glob("rover-*"):
        if d.is_dir() and d.name not in keep and {p.name for p in d.iterdir()} <= {"imu.csv", "camera.mp4"}:
            shutil.rmtree(d)


def make_recording(rec_dir: Path, rng: np.random.Generator, kinds: list[str], duration_s: float, fps: float,
                   size: tuple[int, int], codec: str = "libx264") -> list[tuple[float, float, str]]:
    """Write imu.csv and camera.mp4 for one rover; returns its labelled intervals."""
    rec_dir.mkdir(parents=True, exist_ok=True)
    # Independent streams per purpose, so that e.g. a change in the renderer never changes the IMU samples.
    r_motion, r_imu, r_cam = (np.random.default_rng(rng.integers(2**63)) for _ in range(3))
    motion = simulate(r_motion, duration_s, kinds)
    t_imu = imu_times(r_imu, duration_s)
    write_imu_csv(rec_dir / "imu.csv", t_imu, synth_imu(r_imu, motion, t_imu))
    t_frames = frame_times(r_cam, duration_s, fps)
    counts = render_video(rec_dir / "camera.mp4", motion, t_frames, size, float(r_cam.uniform(0.9, 1.1)), fps,
                          codec)
    return event_intervals(motion, t_frames, counts, size, duration_s)


def make_fleet(out_dir: str | Path, n_recordings: int = 8, duration_s: float = 60.0, seed: int = 7,
               fps: float = 15, size: tuple[int, int] = (320, 240), codec: str = "libx264") -> list[str]:
    """Generate the demo fleet into out_dir: one folder per rover (imu.csv, camera.mp4), labels.csv and profile.toml.

    Returns the recording names. Same arguments -> byte-identical CSVs and labels and identical decoded frames.
    """
    if size[0] % 2 or size[1] % 2 or min(size) < 16:
        raise ValueError(f"size must be even and at least 16x16 (4:2:0 video), got {size}")
    if duration_s < 8:
        raise ValueError(f"duration_s must be >= 8, got {duration_s}")
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    plan = plan_fleet(n_recordings, duration_s, seed)
    _clean_old(out, {name for name, _ in plan})
    rows = []
    for i, (name, kinds) in enumerate(plan):
        rng = np.random.default_rng([seed, i])
        for a, b, k in make_recording(out / name, rng, kinds, duration_s, fps, size, codec):
            rows.append(f"{name},{a:.2f},{b:.2f},{k}")
    (out / "labels.csv").write_text("recording_id,t_start_s,t_end_s,kind\n" + "".join(r + "\n" for r in rows))
    (out / "profile.toml").write_text(PROFILE_TOML.replace("clock_offset_s = -0.35",
                                                           f"clock_offset_s = {-CAMERA_OFFSET_S}"))
    return [name for name, _ in plan]


def main(argv: list[str] | None = None) -> int:
    """`fleetsift make-sample --out DIR --recordings N --seconds S --seed K`."""
    ap = argparse.ArgumentParser(prog="fleetsift make-sample", description=__doc__.split("\n")[0])
    ap.add_argument("--out", required=True, help="output folder (the inbox)")
    ap.add_argument("--recordings", type=int, default=8)
    ap.add_argument("--seconds", type=float, default=60.0)
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--fps", type=float, default=15.0)
    ap.add_argument("--size", default="320x240", help="frame size WxH (even numbers)")
    a = ap.parse_args(argv)
    try:
        w, h = (int(x) for x in a.size.lower().split("x"))
    except ValueError:
        ap.error(f"--size must look like 320x240, got {a.size!r}")
    t0 = time.perf_counter()
    names = make_fleet(a.out, n_recordings=a.recordings, duration_s=a.seconds, seed=a.seed, fps=a.fps, size=(w, h))
    print(f"wrote {len(names)} recordings to {a.out} in {time.perf_counter() - t0:.1f} s")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

"""Fixtures shared by the test modules: one demo fleet per session.

The end-to-end tests all need a small fleet of rover recordings (CSV IMU + MP4 camera, planted anomalies,
labels). Generating one costs seconds of rendering and encoding, so it is made once, by the demo generator, and
every test copies the recordings it needs into its own folder (tests write stores, profiles and bags next to
them, so nobody runs on the shared one directly).
"""

from __future__ import annotations

import shutil
from dataclasses import dataclass
from pathlib import Path

import pytest

# 4 rovers x 20 s, the generator's default seed: enough for a baseline with an exclusion zone, short to embed.
DEMO_RECORDINGS, DEMO_SECONDS, DEMO_SEED = 4, 20.0, 7


@dataclass(frozen=True)
class DemoFleet:
    """A generated demo fleet: its folder (recordings, profile.toml, labels.csv) and recording names."""

    root: Path
    names: list[str]

    def copy(self, dest: Path, names: list[str] | None = None) -> Path:
        """An inbox at ``dest`` with the chosen recordings (default: all), the profile and their labels."""
        names = self.names if names is None else list(names)
        dest.mkdir(parents=True, exist_ok=True)
        shutil.copy2(self.root / "profile.toml", dest / "profile.toml")
        lines = (self.root / "labels.csv").read_text().splitlines(keepends=True)
        (dest / "labels.csv").write_text(lines[0] + "".join(x for x in lines[1:] if x.split(",")[0] in names))
        for n in names:
            shutil.copytree(self.root / n, dest / n)
        return dest


@pytest.fixture(scope="session")
def demo_fleet(tmp_path_factory) -> DemoFleet:
    """The demo generator's fleet, made once per session (deterministic: same seed, same bytes)."""
    from fleetsift.demo.fleet import make_fleet

    root = tmp_path_factory.mktemp("demo-fleet") / "fleet"
    names = make_fleet(root, n_recordings=DEMO_RECORDINGS, duration_s=DEMO_SECONDS, seed=DEMO_SEED)
    return DemoFleet(root=root, names=list(names))

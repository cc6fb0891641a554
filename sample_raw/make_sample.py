"""Regenerate the bundled demo fleet into this folder (or --out DIR).

    python sample_raw/make_sample.py                      # the committed defaults: 8 rovers x 60 s, seed 7
    python sample_raw/make_sample.py --recordings 4 --seconds 30 --seed 3 --out /tmp/inbox

Same as `fleetsift make-sample`; see fleetsift/demo/fleet.py for the scenario.
"""

import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))

from fleetsift.demo import fleet as demo_fleet  # noqa: E402

if __name__ == "__main__":
    args = sys.argv[1:]
    if "--out" not in args:
        args = ["--out", str(HERE), *args]
    raise SystemExit(demo_fleet.main(args))

"""The HTML report: content matches the store, thumbnails come from the right frames, every image is embedded and
renders in headless Chromium; (slow) the report a real `fleetsift run` writes."""

import base64
import io
import json
import os
import re
import shutil
import subprocess
import sys
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from fleetsift.flows.report import flagged_spans, pick_top, write_report
from fleetsift.safety import SAFETY_NOTE

ROOT = Path(__file__).resolve().parent.parent
CHROMIUM = "/usr/bin/chromium"
MAX_BYTES = 1_500_000

PROFILE = """
[windowing]
rate_hz = 50.0
window_s = 2.0
hop_s = 1.0
[streams.imu]
kind = "table"
file = "imu.csv"
channels = ["ax", "ay", "az", "gx", "gy", "gz"]
[streams.camera]
kind = "video"
file = "camera.mp4"
clock_offset_s = -0.5
"""
T0 = 0.3  # first IMU sample: window times are seconds from here
FPS = 4
N_FRAMES = 48  # 12 s


def level(i):
    """Grey level of synthetic frame i, so a thumbnail says which frame it came from."""
    return 10 + 5 * i


class Doc(HTMLParser):
    """The parts of the report the tests read: fleet table rows, cards, images (with the card they sit in)."""

    def __init__(self):
        super().__init__()
        self.rows, self.cards, self.imgs, self.text = [], [], [], []
        self._in_fleet = self._cell = False
        self._card = None
        self._depth = 0

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "table" and a.get("id") == "fleet":
            self._in_fleet = True
        if self._in_fleet and tag == "tr":
            self.rows.append([])
        if self._in_fleet and tag == "td":
            self._cell = True
            self.rows[-1].append("")
        if tag == "div":
            if "card" in (a.get("class") or "").split():
                self._card = {"id": a.get("id"), "recording": a.get("data-recording"), "imgs": [], "text": ""}
                self.cards.append(self._card)
                self._depth = 0
            if self._card is not None:
                self._depth += 1
        if tag == "img":
            self.imgs.append(a)
            if self._card is not None:
                self._card["imgs"].append(a)

    def handle_endtag(self, tag):
        if tag == "table":
            self._in_fleet = False
        if tag == "td":
            self._cell = False
        if tag == "div" and self._card is not None:
            self._depth -= 1
            if self._depth == 0:
                self._card = None

    def handle_data(self, data):
        self.text.append(data)
        if self._cell:
            self.rows[-1][-1] += data
        if self._card is not None:
            self._card["text"] += data


def parse(path) -> Doc:
    d = Doc()
    d.feed(Path(path).read_text(encoding="utf-8"))
    return d


def decode(src: str):
    from PIL import Image

    head, _, data = src.partition(",")
    assert head in ("data:image/png;base64", "data:image/jpeg;base64"), head[:40]
    im = Image.open(io.BytesIO(base64.b64decode(data)))
    im.load()
    return im


# ------------------------------------------------------------------------------------------- a small store

def make_store(base: Path):
    """A store with one run written through Store.append, and recording folders with real IMU and video files."""
    from fleetsift.demo.video import write_video
    from fleetsift.profile import load_profile
    from fleetsift.store import Store

    inbox = base / "inbox"
    inbox.mkdir()
    (inbox / "profile.toml").write_text(PROFILE)
    rng = np.random.default_rng(0)
    for name in ("rover-a", "rover-b"):
        rec = inbox / name
        rec.mkdir()
        t = T0 + np.arange(1200) / 100.0
        x = rng.normal(size=(1200, 6)) * 0.1 + [0, 0, 9.81, 0, 0, 0]
        pd.DataFrame({"t": t, **{c: x[:, j] for j, c in enumerate(["ax", "ay", "az", "gx", "gy", "gz"])}}).to_csv(
            rec / "imu.csv", index=False)
        frames = (np.full((120, 160, 3), level(i), np.uint8) for i in range(N_FRAMES))
        # Lossless H.264: only the YUV 4:2:0 round trip remains (measured within 2 grey levels of 5 apart).
        write_video(rec / "camera.mp4", frames, fps=FPS, codec="libx264", options={"qp": "0", "preset": "ultrafast"})
    st = Store(base / "store").init()
    run_id = "20260101T020000Z-abc123"
    now = pd.Timestamp("2026-01-01 02:00:00", tz="UTC")
    recs = pd.DataFrame({
        "run_id": run_id, "recording_id": ["rover-a", "rover-b", "rover-c"], "content_hash": ["h1", "h2", ""],
        "duration_s": [11.99, 11.99, None], "status": ["scored", "scored", "unscored"],
        "reason": ["", "", "rover-c/imu.csv: column 'ax': expected numbers, got text"],
        "path": [str(inbox / "rover-a"), str(inbox / "rover-b"), str(inbox / "rover-c")]})
    st.append("recordings", recs)
    scores = {"rover-a": [1.0, 1.2, 5.0, 4.0, 1.1, np.nan, 0.9, 3.0, 1.0],
              "rover-b": [1.1, 0.8, 1.0, 1.3, 4.5, 1.2, 1.0, 0.9, 1.1]}
    rows = []
    for rid, s in scores.items():
        s = np.asarray(s)
        for m, f in (("riemann", 1.0), ("logeuclid", 1.5), ("euclid", 0.5)):
            thr = 2.0 * f
            rows.append(pd.DataFrame({
                "run_id": run_id, "recording_id": rid, "window_index": np.arange(9), "t_start_s": np.arange(9.0),
                "t_end_s": np.arange(9.0) + 2.0, "metric": m, "score": s * f, "threshold": thr,
                "flagged": np.nan_to_num(s * f) > thr,
                "top_channels": ["" if (m != "riemann" or np.isnan(v)) else "ax:0.600,camera.pc1:0.250,gz:0.150"
                                 for v in s],
                "baseline_id": "b-test"}))
    w = pd.concat(rows, ignore_index=True)
    st.append("windows", w)
    st.append("runs", pd.DataFrame([{
        "run_id": run_id, "started_at": now, "finished_at": now, "code_version": "0.1.0",
        "profile_hash": load_profile(inbox / "profile.toml").digest(), "baseline_id": "b-test", "n_recordings": 3,
        "n_scored": 2, "n_unscored": 1, "n_windows": 17, "n_flagged": 4, "status": "partial",
        "inbox": str(inbox)}]))
    return st, run_id, w, inbox


@pytest.fixture(scope="module")
def store_run(tmp_path_factory):
    base = tmp_path_factory.mktemp("report")
    st, run_id, w, inbox = make_store(base)
    # rover-b's folder is gone by the time the report is written: its card must say so, not fail.
    shutil.rmtree(inbox / "rover-b")
    out = base / "report.html"
    write_report(str(st.root), None, str(out))
    return st, run_id, w, out


def test_missing_video_keeps_the_traces(tmp_path):
    st, run_id, w, inbox = make_store(tmp_path)
    (inbox / "rover-a" / "camera.mp4").unlink()
    out = tmp_path / "r.html"
    write_report(str(st.root), run_id, str(out), top_n=1)
    (card,) = parse(out).cards
    assert card["recording"] == "rover-a" and "video unreadable" in card["text"] and "camera.mp4" in card["text"]
    assert [i["src"][:14] for i in card["imgs"]] == ["data:image/png"]


def test_one_safety_text_in_the_cli_json_help_report_and_readme(store_run):
    # The safety note is defined once (fleetsift/safety.py): the run JSON, the CLI's help, the HTML report and
    # the README say the same words.
    from fleetsift.flows.cli import build_parser, summarise

    st, run_id, w, out = store_run
    summary = summarise({"run_id": run_id, "store": str(st.root), "store_version": 0, "recordings": [],
                         "stages": {}, "elapsed_s": 0.0}, "riemann")
    assert summary["safety_note"] == summary["note"] == SAFETY_NOTE
    flat = lambda text: " ".join(text.split())  # noqa: E731 -- line wrapping aside
    assert flat(SAFETY_NOTE) in flat(build_parser().format_help())
    assert flat(SAFETY_NOTE) in flat(" ".join(parse(out).text))
    readme = (Path(__file__).resolve().parent.parent / "README.md").read_text()
    quoted = " ".join(line[2:] for line in readme.splitlines() if line.startswith("> "))
    assert flat(SAFETY_NOTE) in flat(quoted.replace("**Safety note.**", ""))


def test_report_matches_store(store_run):
    st, run_id, w, out = store_run
    doc = parse(out)
    text = " ".join(doc.text)
    assert SAFETY_NOTE in text and run_id in text
    prim = w[w["metric"] == "riemann"]
    body = [r for r in doc.rows if r]
    by_name = {r[0]: r for r in body}
    assert sorted(by_name) == ["rover-a", "rover-b", "rover-c"]
    for rid, g in prim.groupby("recording_id"):
        row = by_name[rid]
        assert row[1] == "scored"
        assert int(row[3]) == g["score"].notna().sum() and int(row[4]) == g["score"].isna().sum()
        assert int(row[5]) == int(g["flagged"].sum())
        assert int(row[6]) == len(flagged_spans(g[g["score"].notna()]))
        assert row[7].startswith(f"{g['score'].max():.3f}")
    assert by_name["rover-c"][1] == "unscored" and "expected numbers, got text" in by_name["rover-c"][8]
    assert "expected numbers, got text" in text.split("Unscored recordings")[1]


def test_top_windows_one_per_span(store_run):
    st, run_id, w, out = store_run
    prim = w[(w["metric"] == "riemann") & w["score"].notna()]
    top = pick_top(prim, 10)
    # rover-a's window 3 (3-5 s) overlaps the higher-scoring window 2 (2-4 s) and is left out.
    assert list(zip(top["recording_id"], top["window_index"])) == [("rover-a", 2), ("rover-b", 4), ("rover-a", 7)]
    doc = parse(out)
    assert [(c["id"], c["recording"]) for c in doc.cards] == [("window-1", "rover-a"), ("window-2", "rover-b"),
                                                              ("window-3", "rover-a")]
    for c in doc.cards:
        assert "ax 60%" in c["text"] and "camera.pc1 25%" in c["text"]
    assert "is gone" in doc.cards[1]["text"] and not doc.cards[1]["imgs"]


@pytest.mark.parametrize("card,t_start", [(0, 2.0), (2, 7.0)])
def test_thumbnails_come_from_the_window(store_run, card, t_start):
    st, run_id, w, out = store_run
    c = parse(out).cards[card]
    jpegs = [i for i in c["imgs"] if i["src"].startswith("data:image/jpeg")]
    assert len(jpegs) == 3
    for img, frac in zip(jpegs, (0.1, 0.5, 0.9)):
        t_rel = t_start + 2.0 * frac
        # Common clock -> video pts: + first IMU sample - camera clock offset (-0.5 s); frames every 1/FPS s.
        frame = round((t_rel + T0 + 0.5) * FPS)
        im = np.asarray(decode(img["src"]).convert("L"), float)
        assert im.shape[1] == 176
        assert abs(im.mean() - level(frame)) < 2.5, (img["alt"], im.mean(), level(frame))
    traces = [i for i in c["imgs"] if i["src"].startswith("data:image/png")]
    assert len(traces) == 1 and decode(traces[0]["src"]).size[1] > 150


def test_every_image_embedded_and_small(store_run):
    st, run_id, w, out = store_run
    doc = parse(out)
    assert {i["alt"] for i in doc.imgs} >= {"score timeline rover-a", "score timeline rover-b"}
    for i in doc.imgs:
        decode(i["src"])
    html = out.read_text()
    assert "http://" not in html and "https://" not in html and "<script" not in html
    assert out.stat().st_size < MAX_BYTES


def _chromium(args, tmp_path, timeout=120):
    cmd = [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
           "--disable-background-networking", "--disable-component-update", "--disable-sync", "--hide-scrollbars",
           f"--user-data-dir={tmp_path / 'chromium-profile'}", *args]
    return subprocess.run(cmd, capture_output=True, text=True, timeout=timeout)


# Counts images that failed to decode once the page has loaded; --dump-dom prints the DOM after the load event.
PROBE = ("<script>window.addEventListener('load',function(){var im=document.images,b=0;for(var i=0;i<im.length;"
         "i++){if(!im[i].complete||im[i].naturalWidth===0)b++;}document.body.setAttribute('data-images',im.length);"
         "document.body.setAttribute('data-broken',b);});</script>")


def check_renders(report: Path, tmp_path: Path, shot: Path) -> None:
    if not Path(CHROMIUM).exists():
        pytest.skip(f"{CHROMIUM} not installed (Debian package 'chromium'): cannot check the report renders")
    probe = tmp_path / "probe.html"
    probe.write_text(report.read_text(encoding="utf-8").replace("</body>", PROBE + "</body>"), encoding="utf-8")
    p = _chromium(["--dump-dom", probe.as_uri()], tmp_path)
    assert p.returncode == 0, p.stderr[-2000:]
    n = len(parse(report).imgs)
    assert f'data-images="{n}"' in p.stdout and 'data-broken="0"' in p.stdout, p.stdout[-500:]
    dom = Doc()
    dom.feed(p.stdout)
    assert len(dom.imgs) == n and all(i["src"].startswith("data:image/") for i in dom.imgs)
    p = _chromium([f"--screenshot={shot}", "--window-size=1200,3000", report.as_uri()], tmp_path)
    assert p.returncode == 0, p.stderr[-2000:]
    from PIL import Image

    with Image.open(shot) as im:
        assert im.size == (1200, 3000)
        px = np.asarray(im.convert("L"), float)
    assert px.std() > 10  # not a blank page


def test_report_renders_in_chromium(store_run, tmp_path):
    st, run_id, w, out = store_run
    check_renders(out, tmp_path, tmp_path / "report.png")


def test_report_errors(tmp_path):
    from fleetsift.store import Store

    st = Store(tmp_path / "empty").init()
    with pytest.raises(ValueError, match="committed runs"):
        write_report(str(st.root), None, str(tmp_path / "r.html"))


# ------------------------------------------------------------------------------- slow: a real nightly run

@pytest.mark.slow
@pytest.mark.timeout(1500)
def test_report_of_a_real_run(demo_fleet, tmp_path):
    from fleetsift.store import Store

    inbox, store = demo_fleet.copy(tmp_path / "inbox", demo_fleet.names[-3:]), tmp_path / "store"
    # A lower flagging threshold so this short fleet surely has windows to show (the report reads this profile).
    prof = inbox / "profile.toml"
    text = prof.read_text()
    assert "threshold_c = 3.0" in text
    prof.write_text(text.replace("threshold_c = 3.0", "threshold_c = 1.0"))
    env = dict(os.environ, PREFECT_SERVER_ANALYTICS_ENABLED="false")
    for k in ("PREFECT_HOME", "PREFECT_API_URL", "PREFECT_API_DATABASE_CONNECTION_URL"):
        env.pop(k, None)
    p = subprocess.run([sys.executable, "-m", "fleetsift.flows.cli", "run", "--inbox", str(inbox), "--store", str(store),
                        "--json"], capture_output=True, text=True, env=env, cwd=ROOT, timeout=1200)
    assert p.returncode in (0, 3), p.stderr
    summary = json.loads(p.stdout)
    report = Path(summary["report"])
    doc = parse(report)
    by_name = {r[0]: r for r in doc.rows if r}
    assert sorted(by_name) == sorted(r["recording_id"] for r in summary["recordings"])
    for r in summary["recordings"]:
        assert by_name[r["recording_id"]][1] == r["status"]
        assert int(by_name[r["recording_id"]][5]) == r["n_flagged"]
    w = Store(store).read("windows", run_id=summary["run_id"])
    prim = w[(w["metric"] == summary["metric"]) & w["score"].notna()]
    assert len(doc.cards) == len(pick_top(prim, 10)) >= 1
    assert "has changed since this run" not in " ".join(doc.text)
    for c in doc.cards:  # the demo rovers have a camera and an IMU: three thumbnails and one trace plot each
        kinds = [i["src"][:15] for i in c["imgs"]]
        assert kinds.count("data:image/jpeg") == 3 and kinds.count("data:image/png;") == 1
    print(f"report {report.stat().st_size} bytes for {len(by_name)} recordings, {len(doc.cards)} windows")
    assert report.stat().st_size < MAX_BYTES
    check_renders(report, tmp_path, tmp_path / "real.png")


def test_report_body_is_reused_for_a_run_with_the_same_windows(tmp_path):
    # A night with nothing new writes the same windows under a new run id: its report reuses the rendered body
    # (thumbnails and plots) and differs from the last one only in the run id; a changed score renders anew.
    st, run_id, w, inbox = make_store(tmp_path)
    first = tmp_path / "first.html"
    write_report(str(st.root), run_id, str(first))
    cache = st.root / "cache" / "report"
    assert len(list(cache.glob("*.html"))) == 1

    def rerun(new_id: str, windows: pd.DataFrame) -> Path:
        for table in ("recordings", "runs"):
            df = st.read(table, run_id=run_id)
            st.append(table, df.assign(run_id=new_id))
        st.append("windows", windows.assign(run_id=new_id))
        out = tmp_path / f"{new_id}.html"
        write_report(str(st.root), new_id, str(out))
        return out

    same = rerun("20260102T020000Z-def456", w)
    assert len(list(cache.glob("*.html"))) == 1
    assert same.read_text().replace("20260102T020000Z-def456", run_id) == first.read_text()
    changed = w.copy()
    changed.loc[(changed["recording_id"] == "rover-b") & (changed["window_index"] == 4), "score"] *= 1.5
    other = rerun("20260103T020000Z-0a1b2c", changed)
    assert len(list(cache.glob("*.html"))) == 2
    assert other.read_text().replace("20260103T020000Z-0a1b2c", run_id) != first.read_text()


def test_report_prints_settings_threshold_units_and_iso_times(tmp_path):
    """Window, hop, k, c and metric as values, the threshold in words with c, units on the traces (from the
    profile's `units`), ISO 8601 times, and a score axis that names its metric and statistic."""
    from fleetsift.flows.report import score_axis_label
    from fleetsift.profile import load_profile

    st, run_id, w, inbox = make_store(tmp_path)
    prof = inbox / "profile.toml"
    with_units = PROFILE.replace('channels = ["ax", "ay", "az", "gx", "gy", "gz"]\n',
                                 'channels = ["ax", "ay", "az", "gx", "gy", "gz"]\n'
                                 'units = { ax = "m/s^2", gz = "rad/s" }\n')
    prof.write_text("[scoring]\nk = 4\nknn_stat = \"mean\"\n" + with_units)
    out = tmp_path / "r.html"
    write_report(str(st.root), run_id, str(out), top_n=1)
    doc = parse(out)
    text = re.sub(r"\s+([,.])", r"\1", " ".join(" ".join(doc.text).split()))  # text split at the tags
    assert ("Settings: window 2 s, hop 1 s, clock 50 Hz, metric riemann, method knn, k 4, knn_stat mean, c 2, "
            "descriptor covariance.") in text
    assert "median + c x robust sigma" in text and "robust sigma = 1.4826 x MAD" in text and "This run: c = 2." in text
    assert "finished 2026-01-01T02:00:00Z" in text
    (card,) = doc.cards
    assert [i["alt"] for i in card["imgs"] if i["alt"].startswith("table traces")] == \
        ["table traces of window 1 (ax in m/s^2, gz in rad/s)"]
    # Units label the report only: they leave the stages' cache keys alone.
    assert load_profile(prof).section("streams.imu") == \
        load_profile(tmp_path / "inbox" / "profile.toml").section("streams.imu")
    assert score_axis_label("riemann", load_profile(prof).scoring) == \
        "robust z of the riemann distance, mean of k nearest (k = 4)"


@pytest.mark.parametrize("unit", ["m/s^2", "rad/s", "degrees Celsius per second"])
def test_trace_range_labels_stay_inside_the_image(unit):
    """Each strip's range label, unit included, is drawn inside the figure (a fixed right margin cut "m/s^2" to
    "m/s^"), at the resolution the report saves at."""
    from fleetsift.flows.report import PLOT_DPI, traces_figure

    t = np.linspace(0.0, 20.0, 500)
    series = [(c, t, -1234.5 + 2000.0 * np.sin(t * (i + 1))) for i, c in enumerate(["ax", "ay", "gz"])]
    fig = traces_figure(series, 8.0, 12.0, {"ax": 0.6}, units={c: unit for c, _, _ in series})
    try:
        fig.set_dpi(PLOT_DPI)
        renderer = fig.canvas.get_renderer()
        width = fig.get_figwidth() * fig.dpi
        labels = [tx for tx in fig.axes[0].texts if unit in tx.get_text()]
        assert len(labels) == 3
        for tx in labels:
            box = tx.get_window_extent(renderer)
            assert 0 < box.x0 and box.x1 <= width, (tx.get_text(), box.x1, width)
    finally:
        import matplotlib.pyplot as plt

        plt.close(fig)

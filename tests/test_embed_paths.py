"""The faster embedding paths (ONNX Runtime, int8, skipped frames) against plain float32 torch: the accuracy guard.

Guard (issue 13): per-frame cosine >= 0.98 to float32 torch on scikit-image's photos and on demo frames, the cat
photo still ranked into cat classes, outputs of ONNX Runtime float32 within 1e-4 of torch. The demo's ROC AUC with
the default paths is compared with float32 torch in tests/test_demo_fleet.py (slow).
"""

from pathlib import Path

import numpy as np
import pytest

from fleetsift.errors import InputError
from fleetsift.featurizers import embed as E
from fleetsift.featurizers import video, weights
from fleetsift.profile import VideoStream, parse_profile
from fleetsift.scoring.evaluation import read_labels

skimage_data = pytest.importorskip("skimage.data")
from torchvision.models import ResNet18_Weights  # noqa: E402  (ImageNet class names, offline)

ROOT = Path(__file__).resolve().parent.parent
DEMO_VIDEO = ROOT / "sample_raw" / "rover-03-zone-t" / "camera.mp4"
CAT_CLASSES = range(281, 286)  # ImageNet-1k: tabby, tiger cat, Persian cat, Siamese cat, Egyptian cat
MIN_COSINE = 0.98


def _photos():
    return [skimage_data.chelsea(), skimage_data.coffee(), skimage_data.astronaut(), skimage_data.rocket()]


def _demo_frames(n=40):
    frames = [rgb for _, (_, rgb) in zip(range(n), video.iter_frames(DEMO_VIDEO, 5.0))]
    return np.stack(frames)


def _cos(a, b):
    a, b = np.asarray(a, np.float64), np.asarray(b, np.float64)
    return (a * b).sum(1) / (np.linalg.norm(a, axis=1) * np.linalg.norm(b, axis=1))


@pytest.fixture(scope="module")
def torch_bb():
    return E.load_backbone(threads=2)


@pytest.fixture(scope="module")
def ort_bb(tmp_path_factory):
    bb = E.load_backbone(threads=2)
    bb.use_onnxruntime(tmp_path_factory.mktemp("onnx"), weights.backbone_fingerprint(), "float32")
    return bb


def test_onnxruntime_float32_equals_torch_on_photos_and_demo_frames(torch_bb, ort_bb):
    assert (torch_bb.runtime, ort_bb.runtime) == ("torch", "onnxruntime")
    for frames in ([p[None] for p in _photos()] + [_demo_frames(16)]):
        ref, got = torch_bb(frames), ort_bb(frames)
        assert np.abs(got - ref).max() <= 1e-4  # issue 13's bound; measured 4e-6 .. 8e-6
        assert _cos(got, ref).min() >= MIN_COSINE


def test_onnxruntime_still_ranks_the_cat_photo_into_cat_classes(ort_bb):
    # skimage.data.chelsea() is a photo of a cat (scikit-image's documented sample); ImageNet labels as torchvision
    # ships them.
    assert ResNet18_Weights.IMAGENET1K_V1.meta["categories"][285] == "Egyptian cat"
    z = ort_bb.logits(skimage_data.chelsea()[None])[0]
    assert int(np.argmax(z)) in CAT_CLASSES


def test_onnx_graph_is_cached_by_weights_fingerprint(tmp_path, monkeypatch):
    bb = E.load_backbone(threads=1, image_size=64)
    g1 = bb.use_onnxruntime(tmp_path, "aaaa", "float32")
    calls = []
    real = E._export_onnx
    monkeypatch.setattr(E, "_export_onnx", lambda *a: calls.append(a) or real(*a))
    assert bb.use_onnxruntime(tmp_path, "aaaa", "float32") == g1 and calls == []  # reused, not exported again
    g2 = bb.use_onnxruntime(tmp_path, "bbbb", "float32")
    assert g2 != g1 and len(calls) == 1 and g2.exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == sorted([g1.name, g2.name])  # no temporary file left


def test_skipped_frames_reuse_the_last_embedded_frame_and_never_cross_a_gap(torch_bb):
    rng = np.random.default_rng(3)
    a = rng.integers(0, 256, (48, 64, 3), dtype=np.uint8)
    b = rng.integers(0, 256, (48, 64, 3), dtype=np.uint8)
    near_a = np.clip(a.astype(int) + 1, 0, 255).astype(np.uint8)  # differs by ~1/255 grey level
    t = [0.0, 0.2, 0.4, 1.4, 1.6, 1.8]  # 0.4 -> 1.4 is a timestamp gap
    frames = [a, near_a, a, a, b, b]
    calls = []

    def counting(x):
        calls.append(len(x))
        return torch_bb(x)
    counting.dim = torch_bb.dim
    st = {}
    times, emb = E.embed_frames(zip(t, frames), counting, batch_size=4, skip_threshold=0.01, max_gap_s=0.5,
                                stats=st)
    np.testing.assert_array_equal(times, t)
    # Embedded: a (0.0), a again after the gap (1.4: identical, but never reused across a gap), b (1.6);
    # skipped: 0.2 and 0.4 (like a), 1.8 (like b).
    assert st == {"n_frames": 6, "n_embedded": 3, "n_skipped": 3} and sum(calls) == 3
    for i, j in ((1, 0), (2, 0), (5, 4)):
        np.testing.assert_array_equal(emb[i], emb[j])
    np.testing.assert_allclose(emb[4], torch_bb(b[None])[0], atol=1e-5)
    st0 = {}
    E.embed_frames(zip(t, frames), torch_bb, batch_size=4, skip_threshold=0.0, stats=st0)
    assert st0["n_skipped"] == 0


def test_skip_compares_with_the_last_embedded_frame_so_drift_is_not_skipped_forever():
    base = np.full((64, 64, 3), 100, np.uint8)
    frames = [(0.2 * i, (base + i).astype(np.uint8)) for i in range(10)]  # +1 grey level per frame

    def fake(x):
        return np.asarray(x, np.float32).mean(axis=(1, 2))[:, :1].repeat(2, 1)
    fake.dim = 2
    st = {}
    _, emb = E.embed_frames(frames, fake, batch_size=3, skip_threshold=2.5 / 255, stats=st)
    # Each frame differs from its predecessor by 1 level (below the threshold), but from the last embedded one
    # by 3 levels every third frame: frames 0, 3, 6, 9 are embedded.
    assert st["n_embedded"] == 4
    np.testing.assert_allclose(emb[:, 0], [100, 100, 100, 103, 103, 103, 106, 106, 106, 109])


def test_default_skip_threshold_keeps_demo_frames_within_the_guard(torch_bb):
    frames = _demo_frames(60)
    t = 0.2 * np.arange(len(frames))
    ref = torch_bb(frames)
    st = {}
    _, got = E.embed_frames(zip(t, frames), torch_bb, batch_size=8, skip_threshold=VideoStream.skip_threshold,
                            max_gap_s=0.4, stats=st)
    assert _cos(got, ref).min() >= MIN_COSINE, st


def test_thumbnail_is_the_block_mean_grey_image():
    rng = np.random.default_rng(0)
    img = rng.integers(0, 256, (64, 96, 3), dtype=np.uint8)
    th = E.thumbnail(img, side=32)
    # 64x96 -> no striding, 2x3 blocks: the grey mean of each block (mean over channels), scaled to 0..1.
    ref = img.reshape(32, 2, 32, 3, 3).astype(np.float64).mean(axis=(1, 3, 4)) / 255
    np.testing.assert_allclose(th, ref, atol=1e-6)
    assert E.frame_difference(th, th) == 0.0 and E.frame_difference(th, th[:16]) == np.inf
    moved = th.copy()
    moved[3, 4] += 0.25  # one pixel of 1,024 changes: the largest difference sees it, a mean would not
    assert E.frame_difference(th, moved) == pytest.approx(0.25)


def test_prefetch_forwards_items_and_errors_and_stops_early():
    assert list(E.prefetch(iter(range(50)), 4)) == list(range(50))

    def failing():
        yield 1
        raise InputError("v.mp4", "frames", "decodable frames", "garbage")
    with pytest.raises(InputError):
        list(E.prefetch(failing(), 2))
    closed = []

    def endless():
        try:
            i = 0
            while True:
                yield i
                i += 1
        finally:
            closed.append(True)
    it = E.prefetch(endless(), 3)
    assert [next(it) for _ in range(5)] == [0, 1, 2, 3, 4]
    it.close()
    assert closed == [True]  # the producer thread closed its source


def test_int8_is_kept_only_when_it_passes_the_accuracy_guard(tmp_path, monkeypatch):
    bb = E.load_backbone(threads=2)
    calib = _demo_frames(16)
    ref = bb(calib)
    monkeypatch.setattr(E, "INT8_MIN_COSINE", 1.01)  # a guard nothing passes: int8 is refused, float32 stays
    with pytest.raises(InputError) as err:
        bb.use_onnxruntime(tmp_path, weights.backbone_fingerprint(), "int8", calib)
    assert err.value.field == "precision" and "cosine down to" in str(err.value)
    assert bb.runtime == "torch"
    monkeypatch.setattr(E, "INT8_MIN_COSINE", -1.0)  # a guard everything passes: the int8 graph is used
    graph = bb.use_onnxruntime(tmp_path, weights.backbone_fingerprint(), "int8", calib)
    assert "int8" in graph.name and (bb.runtime, bb.precision) == ("onnxruntime", "int8")
    got = bb(calib)
    cos = _cos(got, ref)
    assert cos.min() > 0.5 and np.abs(got - ref).max() > 1e-4  # int8 arithmetic: close, but not float32


def test_profile_keys_of_the_faster_paths_are_validated():
    base = '[windowing]\n[streams.imu]\nkind = "table"\nfile = "imu.csv"\ntime_column = "t"\n' \
           'channels = ["ax"]\n[streams.camera]\nkind = "video"\nfile = "camera.mp4"\n'
    p = parse_profile(base + 'skip_threshold = 0.02\nruntime = "torch"\nprecision = "float32"\n')
    cam = p.streams["camera"]
    assert (cam.skip_threshold, cam.runtime, cam.precision) == (0.02, "torch", "float32")
    for bad, key in (('skip_threshold = -0.1', "skip_threshold"), ('runtime = "tensorrt"', "runtime"),
                     ('precision = "int4"', "precision"), ('runtime = "torch"\nprecision = "int8"', "precision")):
        with pytest.raises(Exception) as err:
            parse_profile(base + bad + "\n")
        assert f"streams.camera.{key}" in str(err.value)


# --------------------------------------------------------------------------------- the profile keys reach the stage

@pytest.fixture(scope="module")
def camera_recording(tmp_path_factory):
    """A recording whose camera stands still for 3 s, then pans (64 x 48, 15 fps, 6 s)."""
    from fleetsift.demo.video import write_video

    rec = tmp_path_factory.mktemp("inbox") / "rover-a"
    rec.mkdir()
    yy, xx = np.mgrid[0:48, 0:64]

    def frames():
        for i in range(90):
            k = max(0, i - 45)
            img = np.empty((48, 64, 3), np.uint8)
            img[..., 0] = (xx * 4 + 6 * k) % 256
            img[..., 1] = yy * 5
            img[..., 2] = ((xx + yy) * 3 + 9 * k) % 256
            yield img
    write_video(rec / "camera.mp4", frames(), fps=15, options={"crf": "10"})
    return rec


def _run(rec, tmp_path, **camera):
    from inboxes import profile_toml
    from fleetsift.store import Store
    from fleetsift.tasks import stages

    prof = parse_profile(profile_toml(camera={"sample_hz": 5.0, "image_size": 64, "threads": 1, **camera}))
    out = stages.run_embed(str(rec), prof, str(tmp_path / "store"), progress=False)
    assert out["status"] == "ok", out
    arr = Store.load_arrays(out["paths"]["camera"])
    import json
    return out, arr, json.loads(str(arr["meta"]))


def test_skip_threshold_reaches_the_embed_stage(camera_recording, tmp_path):
    out0, a0, m0 = _run(camera_recording, tmp_path, skip_threshold=0.0)
    out1, a1, m1 = _run(camera_recording, tmp_path, skip_threshold=0.008)
    assert out0["paths"] != out1["paths"]  # part of the stage key
    assert m0["frames_skipped"] == 0 and out0["frames_skipped"] == 0
    # Standing still up to t = 3.0 s: 16 frames at 5 Hz, all but the first skipped; the pan is embedded.
    assert out1["frames_skipped"] == m1["frames_skipped"] == 15 and m1["frames"] == m0["frames"] == 30
    np.testing.assert_array_equal(a0["t"], a1["t"])
    assert len(a1["emb"]) == 30 and (a1["emb"][1:16] == a1["emb"][0]).all()
    assert (E._cosine(a1["emb"], a0["emb"]) >= MIN_COSINE).all()


def test_runtime_reaches_the_embed_stage(camera_recording, tmp_path):
    out_t, a_t, m_t = _run(camera_recording, tmp_path, runtime="torch", skip_threshold=0.0)
    out_o, a_o, m_o = _run(camera_recording, tmp_path, runtime="onnxruntime", skip_threshold=0.0)
    assert out_t["paths"] != out_o["paths"]
    assert (m_t["runtime"], m_o["runtime"]) == ("torch", "onnxruntime")
    assert list((tmp_path / "store" / "cache" / "onnx").glob("*-float32.onnx"))  # the cached graph
    assert np.abs(a_o["emb"] - a_t["emb"]).max() <= 1e-4
    assert not np.array_equal(a_o["emb"], a_t["emb"])  # really computed by the other runtime


def test_precision_reaches_the_embed_stage(camera_recording, tmp_path, monkeypatch):
    _, a32, m32 = _run(camera_recording, tmp_path, skip_threshold=0.0)
    monkeypatch.setattr(E, "INT8_MIN_COSINE", -1.0)  # let the int8 graph through whatever its accuracy here
    out8, a8, m8 = _run(camera_recording, tmp_path, skip_threshold=0.0, precision="int8")
    assert (m32["precision"], m8["precision"]) == ("float32", "int8")
    assert np.abs(a8["emb"] - a32["emb"]).max() > 1e-4  # int8 arithmetic, not the float32 graph
    assert list((tmp_path / "store" / "cache" / "onnx").glob("*-int8-*.onnx"))


def test_int8_refused_by_the_guard_is_unscored_with_the_reason(camera_recording, tmp_path, monkeypatch):
    from inboxes import profile_toml
    from fleetsift.tasks import stages

    monkeypatch.setattr(E, "INT8_MIN_COSINE", 1.01)
    prof = parse_profile(profile_toml(camera={"image_size": 64, "threads": 1, "precision": "int8"}))
    out = stages.run_embed(str(camera_recording), prof, str(tmp_path / "store"), progress=False)
    assert out["status"] == "unscored"
    assert "precision: expected int8 embeddings within cosine" in out["reason"]


# --------------------------------------------------------------------------------- slow: the guard on a demo night

@pytest.mark.slow
@pytest.mark.timeout(1200)
def test_demo_night_auc_and_visual_scores_match_plain_float32(tmp_path):
    """The bundled demo night scored twice: plain float32 torch embedding every frame, and the default path (ONNX
    Runtime float32, frames skipped). The whole fleet: on a subset of five recordings the baseline is so small
    that windows near z = +-1 moved by 0.03 (measured), more than on the night the guard is about. ROC AUC within 0.01 (issue 13's guard) and the visual anomalies' window scores within 2 %
    (of one robust standard deviation where a score is smaller than that)."""
    import shutil

    import pandas as pd

    from fleetsift.flows import night
    from fleetsift.flows.evaluate import evaluate_store
    from fleetsift.store import Store
    from fleetsift.tasks import stages

    names = sorted(p.name for p in (ROOT / "sample_raw").iterdir() if p.is_dir())
    inbox = tmp_path / "inbox"
    for n in names:
        shutil.copytree(ROOT / "sample_raw" / n, inbox / n)
    labels = read_labels(str(ROOT / "sample_raw" / "labels.csv"))
    labels = labels[labels["recording_id"].isin(names)]
    labels.to_csv(inbox / "labels.csv", index=False)
    text = (ROOT / "sample_raw" / "profile.toml").read_text().replace("threads = 2", "threads = 1")  # see bench
    plain_text = text.replace('runtime = "onnxruntime"', 'runtime = "torch"').replace(
        "skip_threshold = 0.006", "skip_threshold = 0.0")
    assert plain_text != text
    steps = night.Steps(tables=stages.run_tables, embed=stages.run_embed, score=stages.run_score,
                        write=stages.run_write)
    res = {}
    for name, prof_text in (("plain", plain_text), ("default", text)):
        prof = tmp_path / f"{name}.toml"
        prof.write_text(prof_text)
        store = tmp_path / f"store-{name}"
        out = night.run_night(steps, inbox=str(inbox), store=str(store), profile_path=str(prof), progress=False)
        ev = evaluate_store(str(store), out["run_id"], str(inbox / "labels.csv"), comparison=False)
        w = Store(store).read("windows")
        w = w[w["metric"] == "riemann"].set_index(["recording_id", "window_index"])
        res[name] = (ev["auc"], w, out["embed_frames"])
    assert res["plain"][2]["frames_skipped"] == 0 and res["default"][2]["frames_skipped"] > 0
    for m in ("riemann", "logeuclid", "euclid"):
        assert abs(res["default"][0][m] - res["plain"][0][m]) <= 0.01, (m, res["default"][0], res["plain"][0])
    wp, wd = res["plain"][1], res["default"][1]
    mid = (wp["t_start_s"] + wp["t_end_s"]) / 2
    visual = np.zeros(len(wp), bool)
    for r in labels[labels["kind"].isin(["pallet", "person"])].itertuples():
        visual |= (wp.index.get_level_values(0) == r.recording_id) & (mid >= r.t_start_s).to_numpy() \
            & (mid <= r.t_end_s).to_numpy()
    a, b = wp["score"][visual], wd["score"].reindex(wp.index[visual])
    # 2 % of the score, and of one robust standard deviation where the score (a robust z) is smaller than that:
    # a window scoring 0.2 is normal, and 2 % of it is below what any change of the embedding path resolves.
    # Measured (bench/embed.py --demo): 1.15 % at most, relative to the score itself.
    tol = 0.02 * np.maximum(np.abs(a), 1.0)
    bad = np.abs(b - a) > tol
    assert len(a) > 10 and not bad.any(), pd.DataFrame({"plain": a, "default": b})[bad].to_string()

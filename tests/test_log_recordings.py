"""A ROS 2 bag recording goes through the same stages as the equivalent CSV + video recording."""

import numpy as np
import pytest
from inboxes import profile_toml  # tests/ is on sys.path under pytest

from fleetsift.profile import parse_profile, profile_for
from fleetsift.tasks import stages



@pytest.mark.slow
@pytest.mark.parametrize("storage", ["mcap", "sqlite3"])
def test_bag_recording_matches_csv_and_video(demo_fleet, tmp_path, storage):
    from fleetsift.demo import bag as demo_bag

    name = demo_fleet.names[0]
    rec = demo_fleet.copy(tmp_path / "fleet", [name]) / name
    bag_rec = tmp_path / "bags" / name
    bag_rec.mkdir(parents=True)
    demo_bag.recording_to_bag(rec, bag_rec / "bag", storage=storage, image_hz=5.0)
    # The bag recording's own profile is the one the demo writes, laid over the CSV fleet's.
    (bag_rec / "profile.toml").write_text(demo_bag.BAG_PROFILE)
    store = str(tmp_path / "store")

    csv_p = parse_profile(profile_toml())
    bag_p = profile_for(bag_rec, csv_p)
    t_csv, t_bag = stages.run_tables(str(rec), csv_p, store), stages.run_tables(str(bag_rec), bag_p, store)
    assert t_csv["status"] == t_bag["status"] == "ok", (t_csv, t_bag)
    assert t_bag["channels"] == t_csv["channels"] == ["ax", "ay", "az", "gx", "gy", "gz"]
    a, b = (stages.Store.load_arrays(x["path"]) for x in (t_csv, t_bag))
    np.testing.assert_allclose(a["t"], b["t"], atol=1e-6)
    np.testing.assert_allclose(a["values"], b["values"], atol=1e-6)  # ROS time is whole nanoseconds

    e_csv, e_bag = stages.run_embed(str(rec), csv_p, store, False), stages.run_embed(str(bag_rec), bag_p, store, False)
    assert e_csv["status"] == e_bag["status"] == "ok", (e_csv, e_bag)
    x, y = (stages.Store.load_arrays(r["paths"]["camera"]) for r in (e_csv, e_bag))
    np.testing.assert_allclose(x["t"], y["t"], atol=1e-6)  # same frames chosen by the same sampling rule
    cos = (x["emb"] * y["emb"]).sum(1) / np.linalg.norm(x["emb"], axis=1) / np.linalg.norm(y["emb"], axis=1)
    assert cos.min() > 0.97  # JPEG in the bag vs H.264 in the MP4: the same pictures up to coding noise


def test_csv_columns_renamed_by_fields_and_calibrated_by_channel_name(tmp_path):
    # Outside reference: numpy.interp of the written columns onto the 50 Hz clock (the source is 50 Hz: no low-pass).
    import pandas as pd

    rec = tmp_path / "rec"
    rec.mkdir()
    t = np.arange(0, 10, 0.02) + 0.003
    df = pd.DataFrame({"time": t, "AccX": np.sin(t), "AccY": np.cos(t)})
    df.to_csv(rec / "imu.csv", index=False)
    prof = parse_profile('[streams.imu]\nkind = "table"\nfile = "imu.csv"\ntime_column = "time"\n'
                         'fields = ["AccX", "AccY"]\nchannels = ["ax", "ay"]\n'
                         'calibration.ay = { bias = 1.0, scale = 2.0 }\n')
    out = stages.run_tables(str(rec), prof, str(tmp_path / "store"))
    assert out["status"] == "ok" and out["channels"] == ["ax", "ay"]
    arr = stages.Store.load_arrays(out["path"])
    ta = arr["t"] + out["t0"]
    np.testing.assert_allclose(arr["values"][:, 0], np.interp(ta, t, np.sin(t)), atol=1e-9)
    np.testing.assert_allclose(arr["values"][:, 1], (np.interp(ta, t, np.cos(t)) - 1.0) * 2.0, atol=1e-9)

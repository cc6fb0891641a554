"""Sensor profile parsing and validation: every error names the file, the key, what was expected and found."""

import warnings

import pytest

from fleetsift.errors import ProfileError
from fleetsift.profile import Scoring, load_profile, parse_profile

GOOD = """
[windowing]
rate_hz = 50.0
window_s = 4.0
hop_s = 2.0

[scoring]
k = 3

[streams.imu]
kind = "table"
file = "imu.csv"
channels = ["ax", "ay", "az"]
[streams.imu.calibration]
ax = { bias = 0.1, scale = 2.0 }

[streams.camera]
kind = "video"
file = "camera.mp4"
clock_offset_s = -0.35
pca_dim = 3
"""


def test_good_profile_parses_with_defaults():
    p = parse_profile(GOOD, "fleet.toml")
    assert p.windowing.rate_hz == 50.0 and p.windowing.max_gap_s == 0.25
    assert p.scoring.k == 3 and p.scoring.metric == "riemann"
    imu = p.streams["imu"]
    assert imu.channels == ("ax", "ay", "az") and imu.calibration["ax"].bias == 0.1
    cam = p.streams["camera"]
    assert cam.clock_offset_s == -0.35 and cam.pca_dim == 3 and cam.backbone == "efficientnet_lite0"
    assert [s.name for s in p.table_streams()] == ["imu"]


def test_section_hash_changes_only_with_that_section():
    a = parse_profile(GOOD)
    b = parse_profile(GOOD.replace("bias = 0.1", "bias = 0.2"))
    assert a.section("streams.imu") != b.section("streams.imu")
    assert a.section("streams.camera") == b.section("streams.camera")
    assert a.digest() != b.digest()


@pytest.mark.parametrize("text, key, expected", [
    (GOOD.replace("k = 3", "kk = 3"), "scoring.kk", "known keys"),
    (GOOD.replace("k = 3", 'k = "three"'), "scoring.k", "an integer"),
    (GOOD.replace("rate_hz = 50.0", "rate_hz = -1.0"), "windowing.rate_hz", "> 0"),
    (GOOD.replace('file = "imu.csv"', 'file = "../other/imu.csv"'), "streams.imu.file", "inside the recording"),
    (GOOD.replace('file = "imu.csv"', 'file = "/etc/passwd"'), "streams.imu.file", "inside the recording"),
    (GOOD.replace('kind = "video"', 'kind = "movie"'), "streams.camera.kind", "one of"),
    (GOOD.replace("ax = { bias", "zz = { bias"), "streams.imu.calibration.zz", "calibration for one of"),
    (GOOD.replace("scale = 2.0", "scale = 0.0"), "streams.imu.calibration.ax.scale", "non-zero"),
    (GOOD + "\n[extra]\nx = 1\n", "extra", "known keys"),
    ("[windowing\nrate_hz = 1", "TOML syntax", "valid TOML"),
])
def test_bad_profiles_name_file_key_and_expectation(text, key, expected):
    with pytest.raises(ProfileError) as e:
        parse_profile(text, "fleet.toml")
    err = e.value
    assert err.file == "fleet.toml"
    assert err.field == key
    assert expected in err.expected
    assert str(err).startswith(f"fleet.toml: {key}: expected")


def test_missing_profile_file(tmp_path):
    with pytest.raises(ProfileError) as e:
        load_profile(tmp_path / "nope.toml")
    assert "nope.toml" in str(e.value) and "no such file" in str(e.value)


def test_channel_names_unique_across_streams():
    text = GOOD + '\n[streams.imu2]\nkind = "table"\nfile = "b.csv"\nchannels = ["ax"]\n'
    with pytest.raises(ProfileError, match="unique across streams"):
        parse_profile(text)


def test_fields_rename_to_channels_and_count_must_match():
    text = GOOD.replace('channels = ["ax", "ay", "az"]', 'fields = ["acc_x", "acc_y", "acc_z"]\n'
                                                         'channels = ["ax", "ay", "az"]')
    st = parse_profile(text).streams["imu"]
    assert st.fields == ("acc_x", "acc_y", "acc_z") and st.channels == ("ax", "ay", "az")
    with pytest.raises(ProfileError) as e:
        parse_profile(text.replace('"acc_z"]', '"acc_z", "acc_w"]'), "fleet.toml")
    assert e.value.field == "streams.imu.channels" and "one channel name for each of the 4 fields" in str(e.value)


def test_recording_profile_lays_its_stream_sections_over_the_fleets(tmp_path):
    from fleetsift.profile import profile_for

    fleet = parse_profile(GOOD, "fleet.toml")
    rec = tmp_path / "rec-bag"
    rec.mkdir()
    (rec / "profile.toml").write_text('[streams.imu]\nfile = "bag"\ntopic = "/imu"\n'
                                      'fields = ["linear_acceleration"]\n'
                                      '[streams.imu.calibration]\nay = { bias = 0.5 }\n'
                                      '[streams.camera]\nfile = "bag"\ntopic = "/camera"\n')
    p = profile_for(rec, fleet)
    imu, cam = p.streams["imu"], p.streams["camera"]
    assert (imu.file, imu.topic, imu.fields, imu.channels) == ("bag", "/imu", ("linear_acceleration",),
                                                                ("ax", "ay", "az"))
    # Calibration merges per channel: the fleet's ax stays, the recording adds ay.
    assert imu.calibration["ax"].bias == 0.1 and imu.calibration["ax"].scale == 2.0
    assert imu.calibration["ay"].bias == 0.5
    assert (cam.file, cam.topic, cam.clock_offset_s, cam.pca_dim) == ("bag", "/camera", -0.35, 3)
    assert p.path.endswith("profile.toml") and str(rec) in p.path
    # A section of another kind replaces the fleet's instead of merging into it.
    (rec / "profile.toml").write_text('[streams.camera]\nkind = "table"\nfile = "cam.csv"\nchannels = ["lux"]\n')
    cam = profile_for(rec, fleet).streams["camera"]
    assert cam.kind == "table" and cam.channels == ("lux",) and cam.file == "cam.csv"
    # Errors in the overlay name the recording's own file.
    (rec / "profile.toml").write_text('[streams.imu]\ntopic = 3\n')
    with pytest.raises(ProfileError) as e:
        profile_for(rec, fleet)
    assert e.value.field == "streams.imu.topic" and e.value.file.endswith("rec-bag/profile.toml")
    # Without a recording profile the fleet's applies unchanged.
    assert profile_for(tmp_path, fleet) is fleet


def test_renamed_profile_names_still_read_with_a_deprecation_message():
    from fleetsift.profile import ProfileDeprecation

    base = '[streams.imu]\nkind = "table"\nfile = "imu.csv"\nchannels = ["ax"]\n'
    with pytest.warns(ProfileDeprecation, match="scoring.top_channels is deprecated, call it scoring.n_top_channels"):
        old = parse_profile('[scoring]\ntop_channels = 5\n' + base)
    assert old.scoring.n_top_channels == 5
    with pytest.warns(ProfileDeprecation, match='scoring.method = "mean" is deprecated, write method = "frechet_mean"'):
        assert parse_profile('[scoring]\nmethod = "mean"\n' + base).scoring.method == "frechet_mean"
    with pytest.raises(ProfileError, match="both names"):
        parse_profile('[scoring]\ntop_channels = 5\nn_top_channels = 4\n' + base)
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # the new names read without a message
        assert parse_profile('[scoring]\nn_top_channels = 4\nmethod = "frechet_mean"\n' + base).scoring == \
            Scoring(n_top_channels=4, method="frechet_mean")


def test_descriptor_kind_and_its_estimator_are_two_keys():
    from fleetsift.profile import ProfileDeprecation

    base = '[streams.imu]\nkind = "table"\nfile = "imu.csv"\nchannels = ["ax"]\n'
    with pytest.warns(ProfileDeprecation, match='kind = "oas" is deprecated, write kind = "covariance", '
                                                'shrinkage = "oas"'):
        d = parse_profile('[descriptor]\nkind = "oas"\n' + base).descriptor
    assert (d.kind, d.shrinkage) == ("covariance", "oas")
    d = parse_profile('[descriptor]\nkind = "lagged"\nshrinkage = "oas"\n' + base).descriptor
    assert (d.kind, d.shrinkage) == ("lagged", "oas")
    with pytest.raises(ProfileError, match="shrinkage"):
        parse_profile('[descriptor]\nkind = "oas"\nshrinkage = "ledoit_wolf"\n' + base)
    with pytest.raises(ProfileError, match="descriptor.shrinkage"):
        parse_profile('[descriptor]\nshrinkage = "rbf"\n' + base)

"""One source for each default and each vocabulary.

The profile's dataclasses hold every default; the Python API functions read theirs from them. Each vocabulary
(metrics, descriptor kinds, statistics, time units, scoring methods, stream kinds, stamp sources) is spelled out
once, in fleetsift/vocabulary.py: no other module of the package holds the same literal.
"""

from __future__ import annotations

import ast
import inspect

import pytest

from fleetsift import codebase, vocabulary
from fleetsift.featurizers import descriptors, embed
from fleetsift.profile import Descriptor, Scoring, VideoStream, parse_profile
from fleetsift.scoring import baseline

# (function, parameter, the profile default it must be)
API_DEFAULTS = [
    (descriptors.describe, "kind", Descriptor.kind),
    (descriptors.describe, "include_mean", Descriptor.include_mean),
    (descriptors.describe, "lags", Descriptor.lags),
    (descriptors.describe, "ridge", Descriptor.ridge),
    (descriptors.lagged_covariance, "lags", Descriptor.lags),
    (baseline.fit_baseline, "k", Scoring.k),
    (baseline.fit_baseline, "metric", Scoring.metric),
    (baseline.fit_baseline, "stat", Scoring.knn_stat),
    (baseline.fit_baseline, "exclusion_s", Scoring.exclusion_s),
    (baseline.fit_baseline, "trim_fraction", Scoring.trim_fraction),
    (baseline.fit_baseline, "c", Scoring.threshold_c),
    (baseline.threshold, "c", Scoring.threshold_c),
    (baseline.knn_scores, "k", Scoring.k),
    (baseline.knn_scores, "stat", Scoring.knn_stat),
    (baseline.top_channels, "top", Scoring.n_top_channels),
    (embed.embed_frames, "batch_size", VideoStream.batch_size),
    (embed.load_backbone, "name", VideoStream.backbone),
    (embed.load_backbone, "threads", VideoStream.threads),
    (embed.load_backbone, "image_size", VideoStream.image_size),
]


@pytest.mark.parametrize("fn,param,want", API_DEFAULTS, ids=lambda x: getattr(x, "__name__", str(x)))
def test_api_defaults_are_the_profiles(fn, param, want):
    assert inspect.signature(fn).parameters[param].default == want


def test_a_profile_without_sections_gets_the_dataclass_defaults():
    # The kept values: k 3, ridge chosen from the baseline's own spectrum, batch 8.
    p = parse_profile('[streams.imu]\nkind = "table"\nfile = "imu.csv"\nchannels = ["ax"]\n'
                      '[streams.cam]\nkind = "video"\nfile = "c.mp4"\n')
    assert (p.scoring, p.descriptor) == (Scoring(), Descriptor())
    assert (p.scoring.k, p.descriptor.ridge, p.streams["cam"].batch_size) == (3, "auto", 8)


def _vocabularies() -> dict[str, frozenset]:
    out = {}
    for name, value in vars(vocabulary).items():
        if name.isupper() and isinstance(value, (tuple, dict)):
            out[name] = frozenset(value)
    return out


def _string_collections(source: str):
    """(line, frozenset of strings) for every tuple/list/set/dict literal made only of string constants (for a
    dict: its keys)."""
    for node in ast.walk(ast.parse(source)):
        if isinstance(node, (ast.Tuple, ast.List, ast.Set)):
            items = node.elts
        elif isinstance(node, ast.Dict):
            items = node.keys
        else:
            continue
        if len(items) >= 2 and all(isinstance(x, ast.Constant) and isinstance(x.value, str) for x in items):
            yield node.lineno, frozenset(x.value for x in items)


def test_each_vocabulary_is_spelled_out_once():
    vocab = _vocabularies()
    assert {"METRICS", "SPD_METRICS", "DESCRIPTOR_KINDS", "KNN_STATS", "TIME_UNITS", "SCORING_METHODS",
            "STREAM_KINDS", "STAMP_SOURCES"} <= set(vocab)
    found = []
    for mod in codebase.module_files():
        if mod == "fleetsift.vocabulary":
            continue
        for line, items in _string_collections(codebase.read_source(mod)):
            found += [f"{mod}:{line} repeats {name}" for name, v in vocab.items() if items == v]
    assert found == []


def test_the_vocabulary_check_finds_a_copy():
    src = 'METRICS = ("riemann", "logeuclid", "euclid")\nUNITS = {"s": 1, "ms": 1e-3, "us": 1e-6, "ns": 1e-9}\n'
    got = [items for _, items in _string_collections(src)]
    vocab = _vocabularies()
    assert vocab["METRICS"] in got and vocab["TIME_UNITS"] in got

"""Stage code versions: each stage's cache key changes when, and only when, code that stage runs changes.

Every module of the featurizers and scoring layers (and each stage function) is edited in turn, by handing
code_version an edited source text, and the three stage versions are compared with the unedited ones.
"""

from __future__ import annotations

import ast
import subprocess
import sys

import pytest

from fleetsift import codebase
from fleetsift.tasks import stages

# What each stage runs, written out by hand here (the stages find it by following imports): the expectation.
RUNS = {
    "tables": {"tables", "recording", "logs"},
    "embed": {"video", "embed", "weights", "logs"},
    "score": {"descriptors", "pca", "tables", "geometry", "index", "baseline", "fleet", "evaluation", "history",
              "novelty"},
}
STAGE_FUNCTIONS = {"tables": ["run_tables"], "embed": ["run_embed", "_frames", "_backbone", "skip_gap_s", "int8_calibration",
                                                     "int8_calibration_recordings"],
                   "score": ["run_score", "load_features", "space_key", "table_streams_of", "load_history",
                             "load_reviews", "_history_digest", "_save_baseline"]}
LAYER_MODULES = [m for m in codebase.module_files() if m.startswith(("fleetsift.featurizers.", "fleetsift.scoring."))]


def _edited(name: str, function: str | None = None):
    """codebase.read_source with one module (or one function of it) edited: a statement appended to it."""
    real = codebase.read_source

    def read(module: str) -> str:
        src = real(module)
        if module != name:
            return src
        if function is None:
            return src + "\n_EDITED = True\n"
        node = next(n for n in ast.parse(src).body if getattr(n, "name", None) == function)
        lines = src.splitlines(keepends=True)
        indent = " " * node.body[-1].col_offset
        lines.insert(node.end_lineno, f"{indent}_edited = True\n")
        return "".join(lines)

    return read


def _versions() -> dict[str, str]:
    stages.stage_version.cache_clear()
    return {s: stages.stage_version(s) for s in stages.STAGE_CODE}


@pytest.fixture
def baseline_versions():
    yield _versions()
    stages.stage_version.cache_clear()


def test_every_layer_module_is_covered_by_the_expectation():
    short = {m.rsplit(".", 1)[1] for m in LAYER_MODULES}
    assert len(short) == len(LAYER_MODULES) == 15
    assert set().union(*RUNS.values()) == short, "a module no stage runs, or a new one: say which stage runs it"


@pytest.mark.parametrize("module", LAYER_MODULES)
def test_editing_a_module_changes_exactly_the_stages_that_run_it(module, monkeypatch, baseline_versions):
    monkeypatch.setattr(codebase, "read_source", _edited(module))
    after = _versions()
    short = module.rsplit(".", 1)[1]
    changed = {s for s in after if after[s] != baseline_versions[s]}
    assert changed == {s for s, mods in RUNS.items() if short in mods}, module


@pytest.mark.parametrize("stage,function", [(s, f) for s, fs in STAGE_FUNCTIONS.items() for f in fs])
def test_editing_a_stage_function_changes_only_its_stage(stage, function, monkeypatch, baseline_versions):
    monkeypatch.setattr(codebase, "read_source", _edited("fleetsift.tasks.stages", function))
    after = _versions()
    assert {s for s in after if after[s] != baseline_versions[s]} == {stage}


@pytest.mark.parametrize("module,changes", [("fleetsift.vocabulary", True), ("fleetsift.profile", False),
                                            ("fleetsift.errors", False), ("fleetsift.store", False)])
def test_core_modules_in_the_versions(module, changes, monkeypatch, baseline_versions):
    # The vocabularies' values change what is computed (seconds per time unit); the profile's values reach the keys
    # through the profile sections, so editing its code (a new key) must not invalidate every embedding.
    monkeypatch.setattr(codebase, "read_source", _edited(module))
    after = _versions()
    assert {s for s in after if after[s] != baseline_versions[s]} == (set(after) if changes else set())


def test_the_demo_video_writer_is_in_no_stage():
    for s in stages.STAGE_CODE:
        assert "fleetsift.demo.video" not in stages.stage_modules(s)
    assert "fleetsift.featurizers.logs" in stages.stage_modules("tables")


def test_building_the_embed_key_does_not_import_torch():
    code = ("import sys\nfrom fleetsift.tasks import stages\nstages.stage_version('embed')\n"
            "assert 'torch' not in sys.modules, 'torch imported'\nprint('ok')\n")
    p = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert p.returncode == 0 and p.stdout.strip() == "ok", p.stderr

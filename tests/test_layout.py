"""The repository layout is the architecture: one import root, layers that import only downwards, no old paths.

Every module's imports are parsed (ast, nothing imported) with the reader the stage code versions use
(fleetsift.codebase). Also: the README's Python API snippet runs, and the installed CLI starts from anywhere.
"""

from __future__ import annotations

import ast
import subprocess
import sys
from pathlib import Path

import pytest

from fleetsift import codebase

ROOT = Path(__file__).resolve().parent.parent
BIN = Path(sys.executable).parent

# Layers in pipeline order: a module may import its own layer and those below it, never one above.
LAYERS = {"core": 0, "featurizers": 1, "scoring": 2, "tasks": 3, "flows": 4}
# Top-level names that were import roots before the layers became subpackages of fleetsift.
OLD_ROOTS = {"featurizers", "scoring", "tasks", "flows"}
# Modules that moved, by their old dotted path.
MOVED = {"fleetsift.demo_fleet", "fleetsift.demo_bag"} | {
    f"fleetsift.featurizers.{m}" for m in ("spd", "scoring", "fleet", "evaluation", "opendata")}


def layer(module: str) -> str:
    parts = module.split(".")
    if len(parts) > 1 and parts[1] == "demo":
        return "demo"
    return parts[1] if len(parts) > 1 and parts[1] in LAYERS else "core"


def violations(module: str, imports: list[codebase.Import]) -> list[str]:
    """Why each of a module's imports breaks the layering (empty when none does)."""
    src = layer(module)
    out = []
    for imp in imports:
        dst = layer(imp.module)
        if dst == "demo":
            # The demo generators stay out of the pipeline: only the CLI's demo commands load them, lazily.
            if src != "demo" and not (module == "fleetsift.flows.cli" and not imp.top_level):
                out.append(f"{module}:{imp.line} imports the demo package {imp.module}")
        elif src == "demo":
            if dst != "core":
                out.append(f"{module}:{imp.line} (demo) imports {imp.module}: the demo may use the core only")
        elif LAYERS[dst] > LAYERS[src]:
            out.append(f"{module}:{imp.line} ({src}) imports {imp.module} ({dst}): an upward import")
    return out


def repo_python_files() -> list[Path]:
    out = subprocess.run(["git", "ls-files", "*.py"], cwd=ROOT, capture_output=True, text=True, check=True)
    files = {ROOT / f for f in out.stdout.split()}
    files |= {p for d in ("fleetsift", "featurizers", "scoring", "tasks", "flows", "tests", "bench", "sample_raw",
                          "scripts") for p in (ROOT / d).rglob("*.py")}  # also files not committed yet
    return sorted(p for p in files if p.exists())


def test_the_layers_are_installed_as_subpackages_of_one_root():
    files = codebase.module_files()
    for pkg, folder in [("fleetsift.featurizers", "featurizers"), ("fleetsift.scoring", "scoring"), ("fleetsift.tasks",
                        "tasks"), ("fleetsift.flows", "flows"), ("fleetsift.demo", "fleetsift/demo")]:
        assert files[pkg] == ROOT / folder / "__init__.py"
    for m in ("fleetsift.scoring.geometry", "fleetsift.scoring.index", "fleetsift.scoring.baseline",
              "fleetsift.scoring.fleet", "fleetsift.scoring.evaluation", "fleetsift.demo.fleet", "fleetsift.demo.bag",
              "fleetsift.demo.video"):
        assert m in files
    assert not MOVED & set(files)


def test_no_import_runs_upward():
    found = [v for m in codebase.module_files() for v in violations(m, codebase.imports_of(m))]
    assert found == []


def test_the_layering_check_catches_upward_and_demo_imports():
    # The check itself can fail: an upward import, a pipeline import of the demo and a top-level demo import in
    # the CLI are each reported; the CLI's lazy demo import is not.
    known = codebase.module_files()
    cases = {
        ("fleetsift.featurizers.tables", "from fleetsift.scoring import geometry\n"): 1,
        ("fleetsift.store", "def f():\n    from fleetsift.featurizers import video\n"): 1,
        ("fleetsift.scoring.fleet", "from fleetsift.demo import fleet\n"): 1,
        ("fleetsift.flows.cli", "from fleetsift.demo import fleet\n"): 1,
        ("fleetsift.flows.cli", "def f():\n    from fleetsift.demo import fleet\n"): 0,
        ("fleetsift.demo.bag", "from fleetsift.featurizers import logs\n"): 1,
        ("fleetsift.flows.sweep", "from fleetsift.tasks import stages\nfrom fleetsift.scoring import fleet\n"): 0,
    }
    for (module, src), n in cases.items():
        imps = codebase.imports_in(src, module.rpartition(".")[0], known)
        flagged_lines = {v.split(" ")[0] for v in violations(module, imps)}  # "module:line"
        assert len(flagged_lines) == n, (module, src)


def _old_module_paths() -> set[str]:
    """Dotted paths the layers' modules had as top-level packages ("flows.cli", "featurizers.spd", ...)."""
    out = {m.replace("fleetsift.", "", 1) for m in codebase.module_files() if layer(m) in OLD_ROOTS and
           m.count(".") > 1}  # not the bare folder names: "scoring" is also a profile section
    return out | {m.replace("fleetsift.", "", 1) for m in MOVED if m.startswith("fleetsift.featurizers.")}


def _defined_in(path: Path) -> set[str]:
    """Names a package's __init__ defines at top level (fleetsift's __version__)."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    return {t.id for n in tree.body if isinstance(n, ast.Assign) for t in n.targets if isinstance(t, ast.Name)}


def _old_path_imports(path: Path) -> list[str]:
    tree = ast.parse(path.read_text(encoding="utf-8"), str(path))
    known = codebase.module_files()
    out = []
    for node in ast.walk(tree):
        where = f"{path.relative_to(ROOT)}:{getattr(node, 'lineno', 0)}"
        if isinstance(node, ast.Import):
            mods = [a.name for a in node.names]
            names: list[str] = []
        elif isinstance(node, ast.ImportFrom) and not node.level:
            mods, names = [node.module or ""], [a.name for a in node.names]
        elif isinstance(node, ast.Constant) and isinstance(node.value, str):
            # `python -m flows.cli` in a subprocess call, or a module path handed to code_version.
            if node.value in _old_module_paths() or node.value in MOVED:
                out.append(f"{where}: module path {node.value!r}")
            continue
        else:
            continue
        for mod in mods:
            if mod.split(".")[0] in OLD_ROOTS:
                out.append(f"{where}: import of {mod} by its old top-level path")
            full = [mod] + [f"{mod}.{n}" for n in names]
            out += [f"{where}: {f} moved" for f in full if f in MOVED]
            if mod.startswith("fleetsift"):
                if mod not in known:
                    out.append(f"{where}: no module {mod}")
                elif known[mod].name == "__init__.py":
                    defined = _defined_in(known[mod])
                    out += [f"{where}: no module {mod}.{n}" for n in names
                            if f"{mod}.{n}" not in known and n not in defined]
    return out


def test_nothing_imports_a_moved_module_by_its_old_path():
    files = repo_python_files()
    assert len(files) > 40
    found = [x for f in files if f.name != "test_layout.py" for x in _old_path_imports(f)]
    assert found == []


def test_the_old_path_check_catches_old_imports(tmp_path, monkeypatch):
    monkeypatch.setattr(sys.modules[__name__], "ROOT", tmp_path)
    f = tmp_path / "x.py"
    f.write_text("from featurizers import spd\nimport tasks.stages\nfrom fleetsift import demo_fleet\n"
                 "from fleetsift.featurizers import fleet\nfrom fleetsift.scoring import geometry\n"
                 "ARGS = ['-m', 'flows.cli']\n")
    found = _old_path_imports(f)
    assert {int(x.split(":")[1]) for x in found} == {1, 2, 3, 4, 6}, found


def _readme_python_api() -> str:
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    section = text.split("## Python API", 1)[1]
    return section.split("```python\n", 1)[1].split("```", 1)[0]


def test_readme_python_api_runs():
    ns: dict = {}
    exec(compile(_readme_python_api(), "README.md (Python API)", "exec"), ns)
    n = len(ns["C"])
    assert ns["C"].shape == (60, 7, 7) and ns["D"].shape == (5, 60)
    assert ns["dist"].shape == (5, 3) and ns["s"].shape == (n,) and ns["shares"].shape == (n, 6)
    np = ns["np"]
    np.testing.assert_allclose(ns["C2"], ns["C"], atol=1e-8)  # exp_map inverts log_map
    np.testing.assert_allclose(ns["shares"].sum(axis=1), 1.0)
    # The online scorer gives the batch score of a window.
    assert ns["online"].score(ns["C"][7], ns["rec_ids"][7], ns["times"][7]) == pytest.approx(ns["s"][7])


@pytest.mark.parametrize("where", ["repo", "elsewhere"])
def test_cli_starts_as_a_module_from_any_folder(tmp_path, where):
    p = subprocess.run([sys.executable, "-m", "fleetsift.flows.cli", "--help"], capture_output=True, text=True,
                       cwd=ROOT if where == "repo" else tmp_path, timeout=120)
    assert p.returncode == 0, p.stderr
    assert "usage: fleetsift" in p.stdout and "make-sample" in p.stdout


def test_installed_command_starts(tmp_path):
    p = subprocess.run([str(BIN / "fleetsift"), "--help"], capture_output=True, text=True, cwd=tmp_path, timeout=120)
    assert p.returncode == 0, p.stderr
    assert "usage: fleetsift" in p.stdout

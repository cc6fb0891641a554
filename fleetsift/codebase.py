"""fleetsift's own modules as source files and the imports between them, read without importing any of them.

A stage's code version (fleetsift.store.code_version) hashes the source of every module the stage runs, found by
following these imports from the stage's entry modules; tests/test_layout.py checks the layering with the same
reader. Only the package folders are imported (each ``__init__`` is a docstring), never a module: building the
embedding stage's key must not load torch.
"""

from __future__ import annotations

import ast
import functools
import importlib.util
from dataclasses import dataclass
from pathlib import Path

ROOT_PACKAGE = "fleetsift"
# The layers, installed as subpackages of one import root (pyproject.toml, package-dir).
PACKAGES = ("fleetsift", "fleetsift.demo", "fleetsift.featurizers", "fleetsift.scoring", "fleetsift.tasks",
            "fleetsift.flows")


@dataclass(frozen=True)
class Import:
    """One import statement's target inside the package: the module it loads and where the statement is."""

    module: str
    line: int
    top_level: bool  # False for an import inside a function (loaded only when that function runs)


@functools.cache
def module_files() -> dict[str, Path]:
    """Every module of the package by dotted name (a package by its own name, for its ``__init__.py``)."""
    out: dict[str, Path] = {}
    for pkg in PACKAGES:
        spec = importlib.util.find_spec(pkg)
        if spec is None or not spec.submodule_search_locations:
            raise ImportError(f"{pkg}: not an installed package (run `make install`)")
        for folder in spec.submodule_search_locations:
            for f in sorted(Path(folder).glob("*.py")):
                out[pkg if f.stem == "__init__" else f"{pkg}.{f.stem}"] = f
    return out


def read_source(name: str) -> str:
    """The source text of one of the package's modules (by dotted name)."""
    return module_files()[name].read_text(encoding="utf-8")


def _resolve(target: str, names: list[str], known) -> list[str]:
    """Modules an ``import target`` / ``from target import names`` statement loads (only the package's own)."""
    if not (target == ROOT_PACKAGE or target.startswith(ROOT_PACKAGE + ".")):
        return []
    out = [target]
    out += [f"{target}.{n}" for n in names if f"{target}.{n}" in known]
    return out


def imports_in(source: str, package: str, known=None) -> list[Import]:
    """The package-internal imports of a module's source (relative imports resolved against ``package``).

    ``known`` (default: the installed modules) decides whether ``from a.b import c`` loads a module ``a.b.c``.
    """
    known = module_files() if known is None else known
    tree = ast.parse(source)
    top = {id(n) for n in tree.body}
    for n in tree.body:  # an `if TYPE_CHECKING:` or `try:` block at module level is still module level
        if isinstance(n, (ast.If, ast.Try)):
            top |= {id(m) for m in ast.walk(n)}
    out = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            targets = [(a.name, []) for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            base = node.module or ""
            if node.level:
                parts = package.split(".")
                base = ".".join(parts[:len(parts) - node.level + 1] + ([base] if base else []))
            targets = [(base, [a.name for a in node.names])]
        else:
            continue
        for target, names in targets:
            for mod in _resolve(target, names, known):
                out.append(Import(mod, node.lineno, id(node) in top))
    return out


def imports_of(name: str) -> list[Import]:
    """The package-internal imports of one installed module."""
    pkg = name if module_files()[name].stem == "__init__" else name.rpartition(".")[0]
    return imports_in(read_source(name), pkg)


def closure(entries) -> list[str]:
    """The entry modules and every package module they import, directly or not (lazy imports included), sorted."""
    known = module_files()
    todo = list(entries)
    seen: set[str] = set()
    while todo:
        name = todo.pop()
        if name in seen:
            continue
        if name not in known:
            raise KeyError(f"{name}: not a module of the {ROOT_PACKAGE} package")
        seen.add(name)
        todo += [i.module for i in imports_of(name) if i.module in known]
    return sorted(seen)


def subpackage(name: str) -> list[str]:
    """Every module of one subpackage (its ``__init__`` included), sorted."""
    return sorted(m for m in module_files() if m == name or (m.startswith(name + ".") and m.count(".") ==
                                                                 name.count(".") + 1))

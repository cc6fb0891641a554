"""Frame embeddings: pretrained EfficientNet-Lite0 rebuilt from torchvision blocks, torchvision backbones, PCA."""

import hashlib

import numpy as np
import pytest
import scipy.signal
import torch
from torch import nn

from fleetsift.errors import InputError
from fleetsift.featurizers import embed as E
from fleetsift.featurizers import pca, weights

skimage_data = pytest.importorskip("skimage.data")

# ImageNet class names offline: torchvision ships them in the weights' metadata (no download needed for .meta).
from torchvision.models import ResNet18_Weights  # noqa: E402

CATEGORIES = ResNet18_Weights.IMAGENET1K_V1.meta["categories"]
CAT_CLASSES = range(281, 286)  # ImageNet-1k: tabby, tiger cat, Persian cat, Siamese cat, Egyptian cat


@pytest.fixture(scope="module")
def lite0():
    return E.load_backbone("efficientnet_lite0", threads=2)


def _softmax(z):
    z = np.asarray(z, dtype=np.float64)
    e = np.exp(z - z.max())
    return e / e.sum()


def test_category_indices_are_the_cat_classes():
    # Source: the ImageNet-1k class list as shipped by torchvision (indices 281-285 are the domestic cats).
    assert [CATEGORIES[i] for i in CAT_CLASSES] == ["tabby", "tiger cat", "Persian cat", "Siamese cat",
                                                    "Egyptian cat"]
    assert CATEGORIES[967] == "espresso" and CATEGORIES[968] == "cup"


def test_pretrained_ranks_cat_photo_into_cat_classes(lite0):
    # skimage.data.chelsea() is a photo of a cat (scikit-image's documented sample). Measured: Egyptian cat 0.79,
    # tiger cat 0.09, tabby 0.07; we assert the class-level fact, not those numbers.
    p = _softmax(lite0.logits(skimage_data.chelsea()[None])[0])
    top5 = set(np.argsort(-p)[:5].tolist())
    assert top5 & set(CAT_CLASSES)
    assert int(np.argmax(p)) in CAT_CLASSES
    assert p[list(CAT_CLASSES)].sum() > 0.5


def test_pretrained_ranks_coffee_photo_as_espresso_or_cup(lite0):
    # skimage.data.coffee() is a cup of espresso (scikit-image's documented sample). Measured: espresso 0.90.
    p = _softmax(lite0.logits(skimage_data.coffee()[None])[0])
    assert set(np.argsort(-p)[:5].tolist()) & {967, 968}


def test_lite0_scaling_matches_stem_batchnorm_statistics(lite0):
    # The stem BatchNorm's running variance was accumulated in training under the true input scaling, so the
    # right scaling makes the stem conv's output variance on natural photos closest to it (common practice
    # reasoning, no published source). Evidence for the mean=std=127.5 choice documented in featurizers/embed.py.
    photos = [skimage_data.chelsea(), skimage_data.coffee(), skimage_data.astronaut(), skimage_data.rocket()]
    stem = lite0.features.stem
    bn = stem.conv[1]
    live = bn.running_var > 1e-6  # dead channels have zero running variance
    candidates = {"127.5": (E.LITE0_MEAN, E.LITE0_STD),
                  "torchvision": (E.TORCHVISION_MEAN, E.TORCHVISION_STD),
                  "unit": ((0.0, 0.0, 0.0), (255.0, 255.0, 255.0))}
    gap = {}
    for label, (mean, std) in candidates.items():
        bb = E.Backbone("probe", lite0.features, lite0.head, 1280, lite0.weights_path, mean, std)
        with torch.inference_mode():
            y = torch.cat([stem.conv[0](stem.pad(bb.preprocess(im[None]))).transpose(0, 1).reshape(32, -1)
                           for im in photos], dim=1).double()
        ratio = torch.log(y.var(dim=1)[live] / bn.running_var.double()[live])
        gap[label] = abs(float(ratio.median()))
    assert gap["127.5"] < gap["torchvision"] and gap["127.5"] < gap["unit"], gap


@pytest.mark.parametrize("size", [7, 8, 9, 223, 224])
@pytest.mark.parametrize("kernel", [1, 3, 5])
@pytest.mark.parametrize("stride", [1, 2])
def test_same_padding_shape(size, kernel, stride):
    # TensorFlow tf.nn.conv2d docs, padding="SAME": output size = ceil(input / stride).
    x = torch.zeros(1, 1, size, size + 1)
    y = nn.functional.conv2d(E.SamePad2d(kernel, stride)(x), torch.zeros(1, 1, kernel, kernel), stride=stride)
    assert y.shape[-2:] == (-(-size // stride), -(-(size + 1) // stride))


@pytest.mark.parametrize("size,kernel", [(7, 3), (8, 3), (8, 5), (9, 5)])
def test_same_padding_values_match_tensorflow_rule(size, kernel):
    # TensorFlow's SAME rule (tf.nn.convolution docs): pad_total = max((out-1)*s + k - in, 0), pad_before =
    # pad_total // 2, the rest after. Reference built with numpy zero-embedding + scipy correlate2d.
    rng = np.random.default_rng(0)
    img = rng.normal(size=(size, size))
    w = rng.normal(size=(kernel, kernel))
    stride = 2
    out = -(-size // stride)
    total = max((out - 1) * stride + kernel - size, 0)
    before = total // 2
    padded = np.zeros((size + total, size + total))
    padded[before:before + size, before:before + size] = img
    ref = scipy.signal.correlate2d(padded, w, mode="valid")[::stride, ::stride]
    layer = E._ConvBN(1, 1, kernel, stride, act=False).eval()
    with torch.no_grad():
        layer.conv[0].weight.copy_(torch.tensor(w).view(1, 1, kernel, kernel))
        layer.conv[1].running_var.fill_(1.0 - 1e-3)  # BN becomes the identity: (x - 0) / sqrt(var + eps) = x
        got = layer(torch.tensor(img, dtype=torch.float32).view(1, 1, size, size))[0, 0].numpy()
    np.testing.assert_allclose(got, ref, rtol=1e-5, atol=1e-5)


def test_state_dict_maps_exactly_and_loads_strict():
    path = E.lite0_weights_path()
    state = torch.load(path, map_location="cpu", weights_only=True)
    model = E.EfficientNetLite0()
    mapped = E.map_lite0_keys(state)
    assert set(mapped) == set(model.state_dict())
    model.load_state_dict(mapped, strict=True)
    # DESIGN.md fact: 4.65 M parameters.
    assert abs(sum(p.numel() for p in model.parameters()) - 4_652_008) == 0
    # A truncated state dict must be refused, not silently half-loaded.
    broken = dict(state)
    broken.pop("_blocks.3._bn1.running_var")
    with pytest.raises(InputError) as err:
        E._load_strict(E.EfficientNetLite0(), E.map_lite0_keys(broken), path)
    assert err.value.field == "weights"


def test_embedding_dim_and_batch_equals_one_by_one(lite0):
    rng = np.random.default_rng(1)
    cat = skimage_data.chelsea()
    frames = np.stack([cat[:240, :320], cat[60:300, 100:420],
                       rng.integers(0, 256, size=(240, 320, 3), dtype=np.uint8)])
    assert lite0.dim == 1280
    batch = lite0(frames)
    assert batch.shape == (3, 1280) and batch.dtype == np.float32
    single = np.concatenate([lite0(f[None]) for f in frames])
    np.testing.assert_allclose(batch, single, rtol=1e-4, atol=1e-4)
    assert np.all(batch >= 0)  # average pool of ReLU6 outputs
    assert not np.allclose(batch[0], batch[2])

    # embed_frames batches (2 + 2 + 1 here) and keeps the presentation timestamps.
    calls = []
    t = [0.0, 0.0667, 0.1333, 0.2, 0.2667]
    times, emb = E.embed_frames(((ti, frames[i % 3]) for i, ti in enumerate(t)), lite0, batch_size=2,
                                progress=calls.append)
    np.testing.assert_array_equal(times, t)
    assert calls == [2, 4, 5]
    np.testing.assert_allclose(emb, batch[[0, 1, 2, 0, 1]], rtol=1e-4, atol=1e-4)


def test_embed_frames_empty_and_bad_frame(lite0):
    times, emb = E.embed_frames(iter(()), lite0)
    assert times.shape == (0,) and emb.shape == (0, 1280)
    with pytest.raises(InputError):
        E.embed_frames([(0.0, np.zeros((8, 8, 3), dtype=np.float32))], lite0)


def test_pca_matches_sklearn_up_to_sign():
    sklearn_decomposition = pytest.importorskip("sklearn.decomposition")
    rng = np.random.default_rng(2)
    X = rng.normal(size=(60, 12)) @ rng.normal(size=(12, 12)) + rng.normal(size=12)
    k = 5
    ours = pca.fit_pca(X, k)
    ref = sklearn_decomposition.PCA(n_components=k, svd_solver="full").fit(X)  # scikit-learn reference
    signs = np.sign(np.sum(ours["components"] * ref.components_, axis=1))
    assert np.all(np.abs(signs) == 1)
    np.testing.assert_allclose(ours["components"] * signs[:, None], ref.components_, atol=1e-10)
    np.testing.assert_allclose(ours["explained_variance"], ref.explained_variance_, rtol=1e-10)
    np.testing.assert_allclose(ours["mean"], ref.mean_, atol=1e-12)
    np.testing.assert_allclose(pca.apply_pca(X, ours) * signs, ref.transform(X), atol=1e-9)
    with pytest.raises(InputError):
        pca.fit_pca(X, 13)


def test_torchvision_backbone_from_state_dict_file(tmp_path):
    import torchvision.models as tvm

    torch.manual_seed(0)
    ref = tvm.get_model("mobilenet_v3_small", weights=None).eval()
    path = tmp_path / "mnv3s.pth"
    torch.save(ref.state_dict(), path)
    bb = E.load_backbone("mobilenet_v3_small", weights=path, threads=2, image_size=96)
    assert bb.dim == 1024  # in_features of the last Linear in mobilenet_v3_small.classifier
    rng = np.random.default_rng(3)
    frames = rng.integers(0, 256, size=(2, 72, 96, 3), dtype=np.uint8)
    a = bb(frames)
    assert a.shape == (2, 1024) and a.dtype == np.float32
    np.testing.assert_array_equal(a, bb(frames))
    bb2 = E.load_backbone("mobilenet_v3_small", weights=str(path), threads=2, image_size=96)
    np.testing.assert_allclose(bb2(frames), a, rtol=1e-6, atol=1e-6)
    # Features + split-off head reproduce the untouched model's logits.
    with torch.inference_mode():
        want = ref(bb.preprocess(frames)).numpy()
    np.testing.assert_allclose(bb.logits(frames), want, rtol=1e-4, atol=1e-4)
    want_fp = hashlib.sha256(path.read_bytes()).hexdigest()[:16]
    assert weights.backbone_fingerprint("mobilenet_v3_small", path) == want_fp


def test_resnet_head_split():
    import torchvision.models as tvm

    model = tvm.get_model("resnet18", weights=None)
    head, dim = E._split_head(model, "resnet18")
    assert dim == 512 and isinstance(head, nn.Linear) and isinstance(model.fc, nn.Identity)


def test_bad_backbone_settings_raise_input_error(tmp_path):
    with pytest.raises(InputError) as err:
        E.load_backbone("mobilenet_v3_small")
    assert err.value.field == "weights"
    with pytest.raises(InputError) as err:
        E.load_backbone("mobilenet_v3_small", weights="")
    assert err.value.field == "weights"
    with pytest.raises(InputError) as err:
        E.load_backbone("no_such_net", weights=tmp_path / "x.pth")
    assert err.value.field == "backbone" and "resnet18" in str(err.value)
    with pytest.raises(InputError) as err:
        E.load_backbone("resnet18", weights=tmp_path / "missing.pth")
    assert err.value.field == "weights"
    # Lite0 weights offered to another architecture: a strict load refuses them.
    with pytest.raises(InputError) as err:
        E.load_backbone("mobilenet_v3_small", weights=E.lite0_weights_path())
    assert err.value.field == "weights"


def test_fingerprint_is_sha256_prefix_and_tracks_content(tmp_path):
    path = E.lite0_weights_path()
    fp = weights.backbone_fingerprint("efficientnet_lite0")
    assert fp == hashlib.sha256(path.read_bytes()).hexdigest()[:16] and len(fp) == 16
    other = tmp_path / "w.pth"
    other.write_bytes(b"a")
    first = weights.backbone_fingerprint("efficientnet_lite0", other)
    other.write_bytes(b"bb")
    assert weights.backbone_fingerprint("efficientnet_lite0", other) != first

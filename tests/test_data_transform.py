"""`transform=` of the loaders: called the way its library calls it (augsplit.item_transform).

Outside references: albumentations 2.0 (A.HorizontalFlip, A.ToTensorV2, A.Crop with its own
BboxParams checks) on the same arrays; torch 2.13 (Tensor.flip, default_collate through a
DataLoader). torchvision is exercised when it can be imported: the torchvision wheels this
machine can install are CUDA builds whose operators do not load with the CPU torch, so here
the tensor path is tested with torch modules, which is what every torchvision v2 transform is.
"""

from __future__ import annotations

import albumentations as A
import numpy as np
import pytest
from specs import LOADER

from augsplit.build import open_mapping
from augsplit.data import Dataset, OnlineSampler
from augsplit.errors import DatasetError
from augsplit.generate import Options, generate
from augsplit.item_transform import chw_float

torch = pytest.importorskip("torch")

SPEC = LOADER
H, W = 20, 24


@pytest.fixture(scope="module")
def root(tmp_path_factory):
    out = tmp_path_factory.mktemp("tf") / "ds"
    generate(None, out, Options(store="files", progress=False), built=open_mapping(SPEC))
    return out


class TensorFlip(torch.nn.Module):
    """A left-right flip that, as torchvision v2 transforms do, changes tensors and passes
    anything else through unchanged (so a numpy image given to it is silently left alone)."""

    def forward(self, x):
        return x.flip(-1) if isinstance(x, torch.Tensor) else x


def test_torch_module_gets_a_chw_tensor_and_returns_one(root):
    plain = Dataset(root, "train")
    ds = Dataset(root, "train", transform=TensorFlip())
    for i in (0, 4):
        img = ds[i]["image"]
        assert isinstance(img, torch.Tensor) and img.dtype == torch.uint8 and tuple(img.shape) == (3, H, W)
        assert np.array_equal(img.numpy(), plain[i]["image"].transpose(2, 0, 1)[:, :, ::-1])
    # chw_float takes the tensor: float32 in [0, 1], still a tensor
    f = Dataset(root, "train", transform=TensorFlip(), chw_float=True)[4]["image"]
    assert isinstance(f, torch.Tensor) and f.dtype == torch.float32
    np.testing.assert_allclose(f.numpy(), plain[4]["image"].transpose(2, 0, 1)[:, :, ::-1] / 255.0, atol=1e-7)
    # a plain function asks for tensors by name; a batch through torch's DataLoader collates
    fn = Dataset(root, "train", transform=lambda t: t.flip(-1), transform_kind="tensor", chw_float=True)
    batch = next(iter(torch.utils.data.DataLoader(fn, batch_size=3)))
    assert tuple(batch["image"].shape) == (3, 3, H, W)
    np.testing.assert_allclose(batch["image"][1].numpy(), fn[1]["image"].numpy())


def test_tensor_transform_must_return_a_tensor_and_leaves_no_target_behind(root):
    with pytest.raises(DatasetError, match="returned ndarray, not a torch tensor"):
        Dataset(root, "train", transform=lambda t: t.numpy(), transform_kind="tensor")[0]
    for target in ("mask", ("class", "bbox")):
        with pytest.raises(DatasetError, match="tensor transform is given the image alone") as e:
            Dataset(root, "train", target=target, transform=TensorFlip())
        assert "\n" not in str(e.value)
    # the item hook is still there for whoever wants the whole item
    hook = Dataset(root, "train", target="mask", transform=lambda item: {**item, "target": 1 - item["target"]})
    assert hook[0]["target"].sum() == H * W - Dataset(root, "train", target="mask")[0]["target"].sum()
    with pytest.raises(DatasetError, match="transform_kind must be one of auto, albumentations, tensor, item"):
        Dataset(root, "train", transform=TensorFlip(), transform_kind="torch")


def test_torchvision_v2_when_importable(root):
    tv2 = pytest.importorskip("torchvision.transforms.v2")
    plain = Dataset(root, "train")
    t = tv2.Compose([tv2.RandomHorizontalFlip(p=1.0), tv2.ToDtype(torch.float32, scale=True)])
    img = Dataset(root, "train", transform=t, chw_float=True)[2]["image"]
    assert isinstance(img, torch.Tensor) and img.dtype == torch.float32
    np.testing.assert_allclose(img.numpy(), plain[2]["image"].transpose(2, 0, 1)[:, :, ::-1] / 255.0, atol=1e-6)


def test_changed_transform_attributes_take_effect(root):
    # as with torchvision's datasets, `ds.transform = ...` after construction is used (and checked)
    plain = Dataset(root, "train", target="mask")
    ds = Dataset(root, "train", target="mask")
    ds.transform = A.Compose([A.HorizontalFlip(p=1.0)])
    ds.chw_float = True
    assert np.array_equal(ds[1]["target"], plain[1]["target"][:, ::-1])
    np.testing.assert_allclose(ds[1]["image"], plain[1]["image"][:, ::-1].transpose(2, 0, 1) / 255.0, atol=1e-7)
    assert "chw_float=True" in repr(ds) and "transform=Compose(...)" in repr(ds)  # the repr shows them too
    ds.transform = TensorFlip()
    with pytest.raises(DatasetError, match="'mask' target would no longer match"):
        ds[0]


def test_albumentations_moves_image_mask_and_box_together(root):
    plain = Dataset(root, "train", target=("class", "mask", "bbox"))
    flip = A.Compose([A.HorizontalFlip(p=1.0)], bbox_params=A.BboxParams(format="pascal_voc", label_fields=["labels"]))
    ds = Dataset(root, "train", target=("class", "mask", "bbox"), transform=flip)
    for i in range(len(ds)):
        got, ref = ds[i], plain[i]
        cls, mask, box = got["target"]
        assert cls == ref["target"][0]
        assert np.array_equal(got["image"], ref["image"][:, ::-1])
        assert np.array_equal(mask, ref["target"][1][:, ::-1])
        x0, y0, x1, y1 = ref["target"][2]
        # a left-right mirror of a box in continuous coordinates (common practice, no source)
        np.testing.assert_allclose(box, [W - x1, y0, W - x0, y1], atol=1e-3)
        ys, xs = np.nonzero(mask)
        np.testing.assert_allclose(box, [xs.min(), ys.min(), xs.max() + 1, ys.max() + 1], atol=1e-3)


def test_albumentations_to_tensor_then_chw_float(root):
    # A.ToTensorV2 returns a CHW tensor: chw_float scales it as it scales a numpy image
    plain = Dataset(root, "test", chw_float=True)
    ds = Dataset(root, "test", transform=A.Compose([A.ToTensorV2()]), chw_float=True)
    img = ds[1]["image"]
    assert isinstance(img, torch.Tensor) and img.dtype == torch.float32
    np.testing.assert_array_equal(img.numpy(), plain[1]["image"])


def test_albumentations_box_target_needs_pascal_voc_and_a_dropped_box_is_nan(root):
    for t in (A.HorizontalFlip(p=1.0), A.Compose([A.HorizontalFlip(p=1.0)], bbox_params=A.BboxParams(format="coco"))):
        with pytest.raises(DatasetError, match="pascal_voc box") as e:
            Dataset(root, "train", target="bbox", transform=t)
        assert "\n" not in str(e.value)
    # albumentations' own crop drops a box that leaves the window
    crop = A.Compose([A.Crop(0, 0, 4, 4)], bbox_params=A.BboxParams(format="pascal_voc", min_visibility=0.5))
    ds, plain = Dataset(root, "train", target="bbox", transform=crop), Dataset(root, "train", target="bbox")
    outside = [i for i in range(len(ds)) if plain[i]["target"][0] >= 4 or plain[i]["target"][1] >= 4]
    assert outside
    for i in outside:
        assert np.isnan(ds[i]["target"]).all() and ds[i]["image"].shape == (4, 4, 3)


def test_sampler_takes_the_same_transforms():
    built = open_mapping(SPEC)
    plain = OnlineSampler(built, "train", length=3)
    s = OnlineSampler(built, "train", length=3, transform=TensorFlip(), chw_float=True)
    np.testing.assert_allclose(s[2]["image"].numpy(), plain[2]["image"].transpose(2, 0, 1)[:, :, ::-1] / 255.0,
                               atol=1e-7)
    a = OnlineSampler(built, "train", length=3, target="mask", transform=A.Compose([A.VerticalFlip(p=1.0)]))
    assert np.array_equal(a[1]["target"], OnlineSampler(built, "train", length=3, target="mask")[1]["target"][::-1])


def test_chw_float_of_every_layout():
    u8 = np.arange(2 * 3 * 3, dtype=np.uint8).reshape(2, 3, 3)
    np.testing.assert_array_equal(chw_float(u8), u8.transpose(2, 0, 1).astype(np.float32) * np.float32(1 / 255))
    assert chw_float(u8[..., 0]).shape == (1, 2, 3)  # grey (H, W)
    f = np.full((2, 3, 1), 0.25, np.float32)
    np.testing.assert_array_equal(chw_float(f), np.full((1, 2, 3), 0.25, np.float32))  # floats are kept
    t = torch.from_numpy(u8.transpose(2, 0, 1).copy())
    np.testing.assert_array_equal(chw_float(t).numpy(), chw_float(u8))  # same numbers as the numpy path

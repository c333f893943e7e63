"""Reprs of the loaders and transforms: short (under 300 characters, one line) and showing how
the object was made — as scikit-learn's estimators show their non-default parameters — so
that, where every argument is a plain value, evaluating the repr makes the same object."""

from __future__ import annotations

import albumentations as A
import numpy as np
import pytest
from specs import BASE, spec_dict, write_spec

from augsplit.albu import HeldOutPlacement, RegionColour, RegionDraws, RegionPlacement
from augsplit.build import open_mapping
from augsplit.data import Dataset, OnlineSampler
from augsplit.epoch import SharedEpoch
from augsplit.generate import Options, generate
from augsplit.paramlog import ParamLog
from augsplit.reprs import MAX_CHARS

SPEC = spec_dict(axes={"x": {"range": [0, 64]}, "y": {"range": [0, 64]}, "hue": {"range": [0, 360]}},
                 canvas={"width": 64, "height": 64, "mode": "rgb"})


@pytest.fixture(scope="module")
def spec_file(tmp_path_factory):
    return write_spec(tmp_path_factory.mktemp("reprs"), SPEC)


@pytest.fixture(scope="module")
def root(spec_file, tmp_path_factory):
    out = tmp_path_factory.mktemp("reprs_ds") / "ds"
    generate(spec_file, out, Options(store="none", progress=False))
    return out


def short(obj) -> str:
    text = repr(obj)
    assert len(text) < MAX_CHARS and "\n" not in text, text
    return text


def test_dataset(root):
    ds = Dataset(root, "train", target=("class", "mask"), chw_float=True, query="x > 2")
    assert short(ds) == f"Dataset({str(root)!r}, 'train', target=('class', 'mask'), chw_float=True, query='x > 2')"
    again = eval(repr(ds), {"Dataset": Dataset})  # noqa: S307 - our own repr
    assert again.manifest.equals(ds.manifest) and np.array_equal(again[0]["image"], ds[0]["image"])
    assert short(Dataset(root, "test")) == f"Dataset({str(root)!r}, 'test')"
    busy = Dataset(root, "train", transform=A.Compose([A.HorizontalFlip(), A.RandomBrightnessContrast(), A.Blur()]),
                   classes=[0, 1], cells=[0], check_pixels=True, parquet_cache=2, query=" and ".join(["x > 1", "y < 60"] * 12))
    text = short(busy)
    assert "transform=Compose(...)" in text and "classes=[0, 1]" in text and "parquet_cache=2" in text


def test_online_sampler(spec_file, tmp_path):
    s = OnlineSampler(str(spec_file), "train", length=12, block=4, chw_float=True)
    assert short(s) == f"OnlineSampler({str(spec_file)!r}, 'train', length=12, chw_float=True, block=4)"
    again = eval(repr(s), {"OnlineSampler": OnlineSampler})  # noqa: S307
    assert np.array_equal(again[3]["image"], s[3]["image"])
    s.set_epoch(2)  # the epoch in force is shown, and the evaluated repr gives that epoch's items
    assert short(s).endswith(", block=4, epoch=2)")
    assert np.array_equal(eval(repr(s), {"OnlineSampler": OnlineSampler})[3]["image"], s[3]["image"])  # noqa: S307
    built = open_mapping(SPEC)
    logged = OnlineSampler(built, "test", seed=9, log=ParamLog(tmp_path / "log"))
    assert short(logged) == (f"OnlineSampler(<spec {built.plan.hash}>, 'test', log=ParamLog({str(tmp_path / 'log')!r}, "
                             "flush_every=4096), seed=9)")
    assert short(logged.torch_iterable()) == f"TorchOnlineIterable({logged!r})"
    assert short(logged._finish).startswith("ItemTransform(None, ")


def test_transforms(spec_file):
    path = str(spec_file)
    t = RegionPlacement(path, "train", content_size=(16, 16), anchor="mask", fill=(1, 2, 3), p=0.5)
    assert short(t) == (f"RegionPlacement({path!r}, 'train', content_size=(16, 16), anchor='mask', colour=True, "
                        "fill=(1, 2, 3), p=0.5)")
    names = {"RegionPlacement": RegionPlacement, "HeldOutPlacement": HeldOutPlacement, "RegionColour": RegionColour}
    again = eval(repr(t), names)  # noqa: S307
    assert repr(again) == repr(t) and again.get_transform_init_args() == t.get_transform_init_args()
    h = HeldOutPlacement(path, "test", content_size=(16, 16), item_key="item", epoch=4)
    assert short(h) == f"HeldOutPlacement({path!r}, 'test', content_size=(16, 16), colour=True, item_key='item', epoch=4)"
    assert repr(eval(repr(h), names)) == repr(h)  # noqa: S307
    built = open_mapping(SPEC)
    c = RegionColour(built, "train", class_key="label")
    assert short(c) == f"RegionColour(<spec {built.plan.hash}>, 'train', class_key='label')"
    assert short(RegionDraws(built, "train")) == f"RegionDraws(<spec {built.plan.hash}>, 'train')"
    assert short(SharedEpoch(3)) == "SharedEpoch(3)"


def test_long_values_are_cut_to_fit(tmp_path):
    deep = tmp_path
    for k in range(3):
        deep = deep / (f"folder{k}-" + "x" * 120)
    deep.mkdir(parents=True)
    spec_file = write_spec(deep, BASE)
    assert len(str(spec_file)) > MAX_CHARS
    t = RegionPlacement(spec_file, "train", content_size=(4, 4), item_key="k" * 200, class_key=None,
                        params_key="p" * 200, fill=tuple(range(50)))
    text = short(t)
    assert text.startswith("RegionPlacement('...") and "spec.yaml'" in text and "'train'" in text
    assert "content_size=(4, 4)" in text

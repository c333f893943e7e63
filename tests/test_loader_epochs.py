"""`set_epoch` reaches DataLoader workers that outlive an epoch (persistent_workers=True).

Outside reference: torch.utils.data.DataLoader (torch 2.13 CPU) with num_workers=2 and
persistent_workers=True, under the fork and spawn start methods of Python's multiprocessing,
in map-style and iterable mode. The workers are started once, in epoch 0; the items they give
in epoch 1 must be the sampler's own items of epoch 1.
"""

from __future__ import annotations

import copy
import pickle

import albumentations as A
import numpy as np
import pytest
from specs import LOADER

from augsplit.albu import HeldOutPlacement
from augsplit.build import open_mapping
from augsplit.data import OnlineSampler
from augsplit.epoch import SharedEpoch
from augsplit.errors import DatasetError

torch = pytest.importorskip("torch")
from torch.utils.data import DataLoader  # noqa: E402

SPEC = LOADER
N, BATCH = 8, 4


@pytest.fixture(scope="module")
def built():
    return open_mapping(SPEC)


def _epochs(sampler, dataset, context: str) -> dict[int, list]:
    loader = DataLoader(dataset, batch_size=BATCH, num_workers=2, persistent_workers=True,
                        multiprocessing_context=context)
    out = {}
    for epoch in (0, 1):
        sampler.set_epoch(epoch)
        out[epoch] = [(int(e), int(i), img) for b in loader
                      for e, i, img in zip(b["row"]["epoch"], b["row"]["item"], b["image"].numpy())]
    return out


@pytest.mark.parametrize("mode", ["map", "iterable"])
@pytest.mark.parametrize("context", ["fork", "spawn"])
def test_set_epoch_reaches_persistent_workers(built, context, mode):
    s = OnlineSampler(built, "train", length=N, block=BATCH)
    got = _epochs(s, s if mode == "map" else s.torch_iterable(), context)
    for epoch in (0, 1):
        assert sorted(i for _, i, _ in got[epoch]) == list(range(N))
        for e, i, img in got[epoch]:
            assert e == epoch
            assert np.array_equal(img, s.item(i, epoch)["image"])
    first = {i: img for _, i, img in got[0]}
    assert all(not np.array_equal(img, first[i]) for _, i, img in got[1])


class _Photos(torch.utils.data.Dataset):
    """Eight random photographs placed by a HeldOutPlacement keyed by item number."""

    def __init__(self, transform):
        self.transform = transform
        self.photos = np.random.default_rng(0).integers(0, 256, (N, 8, 8, 3), dtype=np.uint8)

    def __len__(self):
        return N

    def __getitem__(self, i):
        return self.transform(image=self.photos[i], item=i)["image"]


@pytest.mark.parametrize("context", ["fork", "spawn"])
def test_transform_set_epoch_reaches_persistent_workers(built, context):
    t = HeldOutPlacement(built, "test", content_size=(8, 8), item_key="item")
    ds = _Photos(A.Compose([t]))
    loader = DataLoader(ds, batch_size=BATCH, num_workers=2, persistent_workers=True,
                        multiprocessing_context=context)
    got = {}
    for epoch in (0, 1):
        t.set_epoch(epoch)
        got[epoch] = np.concatenate([b.numpy() for b in loader])
        want = np.stack([ds[i] for i in range(N)])  # this process, same epoch: the reference
        assert np.array_equal(got[epoch], want)
    assert not np.array_equal(got[0], got[1])


def test_shared_epoch_copies_and_bad_values():
    e = SharedEpoch(3)
    # pickled or copied for anything but starting a process, it is a plain number of its own
    for clone in (pickle.loads(pickle.dumps(e)), copy.deepcopy(e)):
        assert clone.value == 3
        e.set(5)
        assert clone.value == 3
        e.set(3)
    for bad in (-1, 1.5, "2", True):
        with pytest.raises(DatasetError, match="non-negative integer"):
            SharedEpoch(bad)
    s = OnlineSampler(open_mapping(SPEC), "train", length=2)
    with pytest.raises(DatasetError, match="OnlineSampler.set_epoch: the epoch is a non-negative integer, got -1"):
        s.set_epoch(-1)
    s.set_epoch(np.int64(4))
    assert s.epoch == 4 and pickle.loads(pickle.dumps(s)).epoch == 4

"""How a loader's item meets the user's transform, and its float CHW image (`chw_float`).

A transform is called the way its library calls it: an albumentations transform with keyword
arrays (image HWC uint8, the mask and box targets alongside), a torch module — every
torchvision v2 transform — with the image as a uint8 CHW tensor (tensor in, tensor out), any
other callable with the item dict. Neither torch nor albumentations is imported for this: an
object of theirs can only exist once its library is loaded.
"""

from __future__ import annotations

import sys
from typing import Callable

import numpy as np

from .errors import DatasetError
from .reprs import made_repr

KINDS = ("auto", "albumentations", "tensor", "item")
_MOVED_WITH_IMAGE = ("mask", "bbox")  # targets a geometric transform must move too


def _kind_of(transform) -> str:
    A = sys.modules.get("albumentations")
    if A is not None and isinstance(transform, (A.BasicTransform, A.BaseCompose)):
        return "albumentations"
    torch = sys.modules.get("torch")
    if torch is not None and isinstance(transform, torch.nn.Module):
        return "tensor"
    if any(c.__module__.startswith("torchvision.") for c in type(transform).__mro__):
        return "tensor"  # torchvision's own Compose is not a torch module
    return "item"


def _bbox_fields(transform, where: str) -> tuple[str, ...]:
    """The label fields of the transform's pascal_voc box processor (refused if it has none)."""
    proc = getattr(transform, "processors", {}).get("bboxes")
    fmt = getattr(getattr(proc, "params", None), "format", None)
    if fmt != "pascal_voc":
        got = f"boxes declared as {fmt!r}" if fmt else "no boxes declared"
        raise DatasetError(f"a 'bbox' target goes to the transform as a pascal_voc box, but it has {got}",
                           where=where, hint="wrap it in A.Compose([...], bbox_params=A.BboxParams(format='pascal_voc'))")
    return tuple(proc.params.label_fields or ())


class ItemTransform:
    """The user's transform bound to a loader's targets: ``apply(item)`` transforms the item
    in place of the old one and, with chw_float, makes its image float32 (C, H, W)."""

    def __init__(self, transform: Callable | None, kind: str, names: tuple[str, ...], chw_float: bool, where: str):
        if kind not in KINDS:
            raise DatasetError(f"transform_kind must be one of {', '.join(KINDS)}, got {kind!r}", where=where)
        if transform is not None and not callable(transform):
            raise DatasetError(f"transform must be callable, got {type(transform).__name__}", where=where)
        self.transform = transform
        self.requested = kind
        self.kind = None if transform is None else _kind_of(transform) if kind == "auto" else kind
        self.names = names
        self.chw_float = bool(chw_float)
        moved = [t for t in names if t in _MOVED_WITH_IMAGE]
        if self.kind == "tensor" and moved:
            raise DatasetError(f"a tensor transform is given the image alone, so the '{moved[0]}' target would no "
                               "longer match it", where=where,
                               hint="use an albumentations transform (it moves masks and boxes with the image) "
                                    "or transform_kind='item' (the whole item dict)")
        self._labels = _bbox_fields(transform, where) if self.kind == "albumentations" and "bbox" in names else ()

    def __repr__(self) -> str:
        return made_repr(self, {"transform": self.transform, "kind": self.kind, "names": self.names,
                                "chw_float": self.chw_float}, positional=("transform",))

    def apply(self, item: dict) -> dict:
        if self.kind == "item":
            item = self.transform(item)
        elif self.kind == "tensor":
            item["image"] = self._tensor(item["image"])
        elif self.kind == "albumentations":
            self._albumentations(item)
        if self.chw_float:
            item["image"] = chw_float(item["image"])
        return item

    def _tensor(self, image: np.ndarray):
        import torch

        out = self.transform(torch.from_numpy(np.ascontiguousarray(image.transpose(2, 0, 1))))
        if not isinstance(out, torch.Tensor):
            raise DatasetError(f"the tensor transform returned {type(out).__name__}, not a torch tensor",
                               where=type(self.transform).__name__)
        return out

    def _albumentations(self, item: dict) -> None:
        names = self.names
        target = list(item["target"]) if len(names) > 1 else [item["target"]]
        data = {"image": item["image"]}
        if "mask" in names:
            data["mask"] = target[names.index("mask")]
        if "bbox" in names:
            box = np.asarray(target[names.index("bbox")], dtype=np.float32)
            visible = box[2] > box[0] and box[3] > box[1]  # an object hidden entirely has no box to move
            data["bboxes"] = box[None] if visible else np.zeros((0, 4), np.float32)
            label = item["row"]["class_index"]
            data.update({f: [label] * len(data["bboxes"]) for f in self._labels})
        out = self.transform(**data)
        item["image"] = out["image"]
        if "mask" in names:
            target[names.index("mask")] = out["mask"]
        if "bbox" in names:
            boxes = np.asarray(out["bboxes"], dtype=np.float32).reshape(-1, 4)
            # a box the transform dropped (moved off the image) is NaN, so batches keep their shape
            target[names.index("bbox")] = boxes[0, :4].copy() if len(boxes) else np.full(4, np.nan, np.float32)
        item["target"] = tuple(target) if len(names) > 1 else target[0]


def chw_float(image):
    """float32 (C, H, W): uint8 scaled by 1/255, float kept as it is; a numpy image (H, W, C) or
    (H, W) is transposed, a torch tensor is taken as (C, H, W) and stays a tensor."""
    torch = sys.modules.get("torch")
    scale = np.float32(1 / 255)
    if torch is not None and isinstance(image, torch.Tensor):
        out = (image if image.ndim == 3 else image[None]).to(torch.float32)
        return out * float(scale) if image.dtype == torch.uint8 else out
    a = np.asarray(image)
    a = a[..., None] if a.ndim == 2 else a
    out = np.ascontiguousarray(a.transpose(2, 0, 1), dtype=np.float32)
    return out * scale if a.dtype == np.uint8 else out


def bound(owner, where: str) -> ItemTransform:
    """The ItemTransform of a loader's current ``transform``, ``transform_kind``, ``chw_float``
    and target ``names``: made (and so checked) again when the user has changed one of them."""
    f = owner.__dict__.get("_finish")
    if (f is None or f.transform is not owner.transform or f.requested != owner.transform_kind
            or f.chw_float != bool(owner.chw_float) or f.names != owner.names):
        f = owner._finish = ItemTransform(owner.transform, owner.transform_kind, owner.names, owner.chw_float, where)
    return f

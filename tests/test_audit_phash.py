"""Perceptual hash against the imagehash library; content hash against hashlib."""

import hashlib

import cv2
import imagehash
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from PIL import Image

from augsplit.audit.phash import (content_hash, fingerprint_images, hex_to_uint64, luma, pack_bits,
                                  phash, phash_batch, resize_grey, uint64_to_hex)


def _images():
    """Noise, blurred polygons and gradients in several sizes and channel layouts,
    including images taller than twice their width (Pillow's vertical-first case)."""
    rng = np.random.default_rng(7)
    out = []
    shapes = [(96, 96, 3), (64, 64), (32, 32, 3), (100, 60, 3), (60, 100, 3), (200, 41), (48, 48, 4),
              (31, 33, 3), (8, 12, 3), (300, 90, 3)]
    for shape in shapes:
        out.append(rng.integers(0, 256, size=shape, dtype=np.uint8))
        img = np.full(shape, int(rng.integers(0, 255)), np.uint8)
        pts = rng.integers(0, min(shape[:2]), size=(5, 2)).astype(np.int32)
        cv2.fillPoly(img, [pts], color=tuple(int(c) for c in rng.integers(0, 256, size=4)))
        out.append(cv2.GaussianBlur(img, (5, 5), 1.5))
        yy, xx = np.mgrid[: shape[0], : shape[1]]
        g = ((xx * 3 + yy * 5) % 256).astype(np.uint8)
        out.append(np.repeat(g[..., None], shape[2], axis=2) if len(shape) == 3 else g)
    return out


def _reference(img):
    mode = {3: "RGB", 4: "RGBA"}.get(img.shape[-1] if img.ndim == 3 else 0, "L")
    return int(str(imagehash.phash(Image.fromarray(img, mode))), 16)


@pytest.mark.parametrize("k", range(30))
def test_phash_equals_imagehash_bit_for_bit(k):
    # Reference: imagehash.phash (DCT hash; Pillow LANCZOS resize to 32x32, scipy DCT-II).
    img = _images()[k]
    assert phash(img) == _reference(img)


def test_batch_equals_single_and_fingerprints_any_sizes():
    imgs = _images()
    hashes, sha = fingerprint_images(imgs, batch=4)
    assert [int(h) for h in hashes] == [_reference(i) for i in imgs]
    # Reference: hashlib.sha256 over the C-ordered pixel bytes (the manifest's sha256 rule).
    assert sha == [hashlib.sha256(np.ascontiguousarray(i).tobytes()).hexdigest() for i in imgs]
    same = [i for i in imgs if i.shape == (96, 96, 3)]
    assert list(phash_batch(np.stack(same))) == [phash(i) for i in same]


def test_luma_and_resize_match_pillow():
    # Reference: Pillow's convert('L') and resize((32, 32), LANCZOS), the steps imagehash takes.
    rng = np.random.default_rng(3)
    rgb = rng.integers(0, 256, size=(50, 70, 3), dtype=np.uint8)
    grey_ref = np.asarray(Image.fromarray(rgb, "RGB").convert("L"))
    assert np.array_equal(luma(rgb), grey_ref)
    for h, w in [(50, 70), (100, 40), (20, 25), (33, 90)]:
        g = rng.integers(0, 256, size=(h, w), dtype=np.uint8)
        ref = np.asarray(Image.fromarray(g, "L").resize((32, 32), Image.Resampling.LANCZOS))
        assert np.array_equal(resize_grey(g[None])[0], ref.astype(float))


def test_bit_order_and_hex_round_trip():
    bits = np.zeros((1, 64), bool); bits[0, 0] = True
    assert int(pack_bits(bits)[0]) == 1 << 63  # first DCT coefficient is the top bit, as imagehash's hex
    h = np.array([0, 1, 2**64 - 1, 0x0123456789ABCDEF], dtype=np.uint64)
    assert np.array_equal(hex_to_uint64(uint64_to_hex(h)), h)


def test_content_hash_sees_one_pixel_and_shifted_images_hash_close():
    rng = np.random.default_rng(5)
    img = cv2.GaussianBlur(rng.integers(0, 256, (96, 96, 3), dtype=np.uint8), (0, 0), 2)
    other = img.copy(); other[5, 5, 0] ^= 1
    assert content_hash(img) != content_hash(other)
    shifted = np.roll(img, 1, axis=1)
    # common practice, no source: a 1 px shift of a 96 px image moves the DCT hash by a few bits
    assert bin(phash(img) ^ phash(shifted)).count("1") <= 5
    far = cv2.GaussianBlur(rng.integers(0, 256, (96, 96, 3), dtype=np.uint8), (0, 0), 2)
    assert bin(phash(img) ^ phash(far)).count("1") > 10


@pytest.mark.parametrize("hw", [(480, 640), (768, 1024), (384, 512), (600, 800), (1024, 300), (257, 1023)])
def test_large_images_hash_bit_for_bit_like_imagehash(hw):
    # Reference: imagehash.phash. Large reductions take the banded resize (a window of the row
    # per block of 8 outputs) and row chunks; (1024, 300) takes Pillow's vertical-first order.
    rng = np.random.default_rng(hw[0] + hw[1])
    imgs = []
    for k in range(3):
        img = cv2.GaussianBlur(rng.integers(0, 256, (*hw, 3), dtype=np.uint8), (0, 0), 1 + 2 * k)
        pts = rng.integers(0, min(hw), size=(6, 2)).astype(np.int32)
        cv2.fillPoly(img, [pts], color=(250, 20, 90))
        imgs.append(img)
    ref = [_reference(i) for i in imgs]
    assert [phash(i) for i in imgs] == ref
    assert [int(h) for h in phash_batch(np.stack(imgs))] == ref
    grey = luma(imgs[0])
    pil = np.asarray(Image.fromarray(grey, "L").resize((32, 32), Image.Resampling.LANCZOS))
    assert np.array_equal(resize_grey(grey[None])[0], pil.astype(float))


def test_coefficients_are_the_block_the_bits_threshold():
    rng = np.random.default_rng(11)
    imgs = np.stack([cv2.GaussianBlur(rng.integers(0, 256, (70, 90, 3), dtype=np.uint8), (0, 0), 2) for _ in range(5)])
    hashes, coef = phash_batch(imgs, coefficients=True)
    assert coef.shape == (5, 8, 8)
    flat = coef.reshape(5, 64).astype(np.float64)
    # imagehash's rule: a bit is set where the coefficient exceeds the block's median
    assert np.array_equal(pack_bits(flat > np.median(flat, axis=1, keepdims=True)), hashes)


@settings(max_examples=200, deadline=None)
@given(st.lists(st.floats(-1e9, 1e9, allow_nan=False, width=64), min_size=64, max_size=64),
       st.integers(0, 64))
def test_median_of_the_dct_block_is_numpys(values, zeros):
    # Reference: numpy.median (imagehash thresholds the block at it); ties and zeros included.
    from augsplit.audit.phash import _median64

    a = np.array(values, dtype=np.float64)
    a[:zeros] = 0.0
    assert np.array_equal(_median64(a[None]), np.median(a[None], axis=1, keepdims=True))

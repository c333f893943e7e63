"""Object sources: polyomino enumeration, glyphs, the user's sprite folder, the Sprite value."""

from __future__ import annotations

import pickle
from pathlib import Path

import cv2
import numpy as np
import pytest

from augsplit.errors import SourceError, SpecError
from augsplit.sources import Glyphs, ObjectSource, Polyominoes, Sprite, SpriteFolder, iter_sprites
from augsplit.sources.base import alpha_anchor
from augsplit.sources.polyomino import canonical, enumerate_polyominoes


# --- polyominoes ---------------------------------------------------------------------------

# OEIS A000105: number of free polyominoes with n cells, n = 1..8.
FREE = [1, 1, 2, 5, 12, 35, 108, 369]
# OEIS A000988: number of one-sided polyominoes with n cells, n = 1..8.
ONE_SIDED = [1, 1, 2, 7, 18, 60, 196, 704]


@pytest.mark.parametrize("n", range(1, 9))
def test_polyomino_counts_match_oeis(n):
    assert len(enumerate_polyominoes(n)) == FREE[n - 1]  # OEIS A000105
    assert len(enumerate_polyominoes(n, one_sided=True)) == ONE_SIDED[n - 1]  # OEIS A000988


def _congruent(a, b, one_sided):
    return canonical(a, one_sided) == canonical(b, one_sided)


@pytest.mark.parametrize("one_sided", [False, True])
def test_polyominoes_are_connected_distinct_and_canonical(one_sided):
    shapes = enumerate_polyominoes(6, one_sided)
    assert list(shapes) == sorted(shapes)  # deterministic order
    for s in shapes:
        assert len(set(s)) == 6 and canonical(s, one_sided) == s
        # connected: flood fill from the first cell reaches all (definition of a polyomino)
        todo, seen = [s[0]], {s[0]}
        while todo:
            r, c = todo.pop()
            for nb in ((r + 1, c), (r - 1, c), (r, c + 1), (r, c - 1)):
                if nb in s and nb not in seen:
                    seen.add(nb)
                    todo.append(nb)
        assert seen == set(s)
    assert len(set(shapes)) == len(shapes)


def test_mirror_images_are_one_free_class_but_two_one_sided():
    # The L tetromino and its mirror image: the same free polyomino, two one-sided ones
    # (the definitions behind OEIS A000105 / A000988).
    ell = ((0, 0), (1, 0), (2, 0), (2, 1))
    mirrored = tuple((r, 1 - c) for r, c in ell)
    assert _congruent(ell, mirrored, one_sided=False)
    assert not _congruent(ell, mirrored, one_sided=True)
    # a rotation by 90 degrees stays the same class either way
    rotated = tuple((c, -r) for r, c in ell)
    assert _congruent(ell, rotated, one_sided=True)


def test_polyomino_tiles_are_drawn_where_the_cells_are():
    src = Polyominoes(cells=5, cell_px=4, gap_px=1, colour=(10, 200, 30))
    assert src.classes == tuple(f"P5-{i:02d}" for i in range(12))
    assert isinstance(src, ObjectSource)
    for ci, shape in enumerate(src.shapes):
        assert src.n_instances(ci) == 1
        sp = src.sprite(ci, 0)
        assert sp.class_name == src.classes[ci] and sp.class_index == ci and sp.instance == 0
        a = sp.rgba[..., 3]
        rows = max(r for r, _ in shape) + 1
        cols = max(c for _, c in shape) + 1
        assert a.shape == (rows * 5 - 1, cols * 5 - 1)
        expected = np.zeros_like(a)
        for r, c in shape:
            expected[r * 5:r * 5 + 4, c * 5:c * 5 + 4] = 255
        np.testing.assert_array_equal(a, expected)
        np.testing.assert_array_equal(sp.rgba[a > 0][:, :3], np.tile([10, 200, 30], (5 * 16, 1)))
        # area check: 5 cells of 4x4 opaque pixels
        assert int((a == 255).sum()) == 5 * 16


def test_polyominoes_are_deterministic_and_one_sided_count_classes():
    a, b = Polyominoes(4, 3), Polyominoes(4, 3)
    assert a.classes == b.classes
    for ci in range(len(a.classes)):
        np.testing.assert_array_equal(a.sprite(ci, 0).rgba, b.sprite(ci, 0).rgba)
    assert len(Polyominoes(5, 2, one_sided=True).classes) == 18  # OEIS A000988, n = 5


@pytest.mark.parametrize("kwargs, key", [
    ({"cells": 0, "cell_px": 3}, "objects.cells"),
    ({"cells": 11, "cell_px": 3}, "objects.cells"),
    ({"cells": 4, "cell_px": 0}, "objects.cell_px"),
    ({"cells": 4, "cell_px": 3, "gap_px": -1}, "objects.gap_px"),
    ({"cells": 4, "cell_px": 3, "colour": (300, 0, 0)}, "objects.colour"),
])
def test_polyomino_bad_arguments(kwargs, key):
    with pytest.raises(SpecError) as e:
        Polyominoes(**kwargs)
    assert e.value.where == key


# --- the Sprite value ------------------------------------------------------------------------

def test_sprite_anchor_is_the_alpha_weighted_centroid_of_cv2_moments():
    # Reference: OpenCV's image moments, centroid = (m10/m00, m01/m00) in pixel-index
    # coordinates; our coordinates put pixel centres at .5, hence the +0.5.
    rng = np.random.default_rng(3)
    for _ in range(20):
        alpha = rng.integers(0, 256, size=(rng.integers(3, 20), rng.integers(3, 20))).astype(np.uint8)
        alpha[0, 0] = 255
        ax, ay = alpha_anchor(alpha)
        m = cv2.moments(np.where(alpha > 127, alpha, 0).astype(np.float64))
        assert ax == pytest.approx(m["m10"] / m["m00"] + 0.5, abs=1e-9)
        assert ay == pytest.approx(m["m01"] / m["m00"] + 0.5, abs=1e-9)


def test_sprite_is_read_only_and_rejects_transparent_patches():
    rgba = np.zeros((4, 5, 4), np.uint8)
    rgba[1:3, 1:4] = 255
    sp = Sprite.from_rgba(rgba, "a", 0, 0)
    assert sp.anchor == (2.5, 2.0)
    rgba[:] = 0  # the sprite holds its own copy
    assert sp.rgba[1, 1, 3] == 255
    with pytest.raises(ValueError):
        sp.rgba[0, 0, 0] = 1
    # radius: farthest corner of an opaque pixel from the anchor, (1.5, 1) away
    assert sp.radius == pytest.approx(np.hypot(1.5, 1.0))
    with pytest.raises(SourceError, match="fully transparent"):
        Sprite.from_rgba(np.full((3, 3, 4), [9, 9, 9, 127], np.uint8), "a", 0, 0, where="x.png")
    # sprites travel to worker processes by pickle: same values, still read-only, no float caches
    sp.premultiplied
    back = pickle.loads(pickle.dumps(sp))
    np.testing.assert_array_equal(back.rgba, sp.rgba)
    assert back.anchor == sp.anchor and (back.class_name, back.class_index, back.instance) == ("a", 0, 0)
    assert not back.rgba.flags.writeable and "premultiplied" not in back.__dict__
    np.testing.assert_array_equal(back.premultiplied, sp.premultiplied)


# --- glyphs ---------------------------------------------------------------------------------

def test_glyphs_classes_instances_and_size():
    g = Glyphs(["A", "7", "Hi"], height_px=24)
    assert g.classes == ("A", "7", "Hi")
    assert [g.n_instances(c) for c in range(3)] == [4, 4, 4]
    for sp in iter_sprites(g):
        assert sp.rgba.shape[0] == pytest.approx(24, abs=3)  # no descenders: about height_px tall
        a = sp.rgba[..., 3]
        assert len(np.unique(a)) > 2  # antialiased edges, not a binary mask
        assert (sp.rgba[a > 0][:, :3] == 255).all()
    # the four fonts give four different drawings of each text
    for c in range(3):
        drawings = {g.sprite(c, i).rgba.tobytes() + bytes(g.sprite(c, i).rgba.shape[:2]) for i in range(4)}
        assert len(drawings) == 4
    # a wider string has a wider patch
    assert g.sprite(2, 0).width > g.sprite(0, 0).width


def test_glyph_errors_name_the_key():
    with pytest.raises(SpecError) as e:
        Glyphs(["A", "A"])
    assert e.value.where == "objects.texts"
    with pytest.raises(SpecError) as e:
        Glyphs(["A", " "])
    assert e.value.where == "objects.texts[1]"
    with pytest.raises(SpecError) as e:
        Glyphs(["Ä"])
    assert e.value.where == "objects.texts[0]"
    with pytest.raises(SpecError) as e:
        Glyphs(["A"], fonts=["gothic"])
    assert e.value.where == "objects.fonts"


# --- sprite folders -------------------------------------------------------------------------

def _write(path: Path, img: np.ndarray) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    if img.ndim == 3 and img.shape[2] == 4:
        img = cv2.cvtColor(img, cv2.COLOR_RGBA2BGRA)
    elif img.ndim == 3:
        img = cv2.cvtColor(img, cv2.COLOR_RGB2BGR)
    assert cv2.imwrite(str(path), img)
    return path


def _disc(size=9, rgb=(200, 50, 20)) -> np.ndarray:
    yy, xx = np.mgrid[:size, :size]
    a = (((xx - size // 2) ** 2 + (yy - size // 2) ** 2) <= (size // 2) ** 2) * 255
    return np.dstack([np.full((size, size, 3), rgb, np.uint8), a.astype(np.uint8)])


def test_sprite_folder_reads_alpha_masks_and_colour_keys(tmp_path):
    disc = _disc()
    _write(tmp_path / "ring" / "b.png", disc)
    _write(tmp_path / "ring" / "a.png", disc[::-1, ::-1])
    rgb = np.full((6, 8, 3), (0, 255, 0), np.uint8)
    rgb[2:5, 1:7] = (10, 20, 30)
    _write(tmp_path / "bar" / "one.png", rgb)
    mask = np.zeros((6, 8), np.uint8)
    mask[1:4, 2:6] = 255
    _write(tmp_path / "bar" / "one_mask.png", mask)
    _write(tmp_path / "bar" / "two.png", rgb)  # no mask: the colour key applies
    (tmp_path / ".DS_Store").write_bytes(b"junk")  # hidden files are ignored

    src = SpriteFolder(tmp_path, key_colour=(0, 255, 0))
    assert src.classes == ("bar", "ring")  # sorted folder names
    assert src.n_instances(0) == 2 and src.n_instances(1) == 2
    assert [p.name for p in src.files[1]] == ["a.png", "b.png"]  # instances sorted by file name
    np.testing.assert_array_equal(src.sprite(1, 1).rgba, disc)
    np.testing.assert_array_equal(src.sprite(0, 0).rgba[..., 3], mask)
    np.testing.assert_array_equal(src.sprite(0, 1).rgba[..., 3], np.where((rgb == (0, 255, 0)).all(2), 0, 255))
    sp = src.sprite(1, 1)
    assert sp.anchor == pytest.approx((4.5, 4.5))  # symmetric disc: centre of the 9x9 patch
    assert sp.class_name == "ring" and sp.class_index == 1 and sp.instance == 1


def _one_class(tmp_path, name: str, content: bytes | np.ndarray | None) -> Path:
    _write(tmp_path / "cls" / "a_good.png", _disc())
    bad = tmp_path / "cls" / name
    if isinstance(content, np.ndarray):
        _write(bad, content)
    elif content is not None:
        bad.write_bytes(content)
    return bad


@pytest.mark.parametrize("name, content, message", [
    ("notes.txt", b"hello", "not an image file"),
    ("empty.png", b"", "0 bytes"),
    ("broken.png", b"this is not a png", "not a readable image"),
    ("clear.png", np.zeros((5, 5, 4), np.uint8), "fully transparent"),
    ("faint.png", np.dstack([np.full((5, 5, 3), 255, np.uint8), np.full((5, 5), 100, np.uint8)]), "fully transparent"),
])
def test_bad_sprite_files_name_the_file(tmp_path, name, content, message):
    bad = _one_class(tmp_path, name, content)
    with pytest.raises(SourceError, match=message) as e:
        SpriteFolder(tmp_path)
    assert e.value.where == str(bad)
    assert bad.name in str(e.value)


def test_bad_masks_name_the_mask_file(tmp_path):
    _write(tmp_path / "cls" / "a.png", np.full((5, 5, 3), 90, np.uint8))
    m = _write(tmp_path / "cls" / "a_mask.png", np.zeros((5, 5), np.uint8))
    with pytest.raises(SourceError, match="fully transparent") as e:
        SpriteFolder(tmp_path)
    assert e.value.where == str(m)
    _write(m, np.full((4, 5), 255, np.uint8))
    with pytest.raises(SourceError, match="mask is 5x4") as e:
        SpriteFolder(tmp_path)
    assert e.value.where == str(m)
    _write(m, np.full((5, 5), 255, np.uint8))
    orphan = _write(tmp_path / "cls" / "zz_mask.png", np.full((5, 5), 255, np.uint8))
    with pytest.raises(SourceError, match="no image beside it") as e:
        SpriteFolder(tmp_path)
    assert e.value.where == str(orphan)


def test_bad_folder_layouts(tmp_path):
    with pytest.raises(SourceError, match="does not exist") as e:
        SpriteFolder(tmp_path / "missing")
    assert e.value.where == str(tmp_path / "missing")
    with pytest.raises(SourceError, match="empty") as e:
        SpriteFolder(tmp_path)
    assert e.value.where == str(tmp_path)
    (tmp_path / "cls").mkdir()
    with pytest.raises(SourceError, match="no images") as e:
        SpriteFolder(tmp_path)
    assert e.value.where == str(tmp_path / "cls")
    stray = _write(tmp_path / "stray.png", _disc())
    with pytest.raises(SourceError, match="one subfolder per class") as e:
        SpriteFolder(tmp_path)
    assert e.value.where == str(stray)

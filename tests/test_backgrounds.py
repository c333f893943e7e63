"""Backgrounds: levels, noise statistics, the 1/f spectrum, image-folder crops and errors."""

from __future__ import annotations

from pathlib import Path

import cv2
import numpy as np
import pytest

from augsplit.errors import SourceError, SpecError
from augsplit.sources import Background, GaussianNoise, ImageFolder, PinkNoise, Solid, UniformNoise


def rng(seed=0):
    return np.random.default_rng(seed)


def spectral_slope(images: np.ndarray, f_lo: float = 1 / 64, f_hi: float = 1 / 4) -> float:
    """Least-squares slope of log mean amplitude vs log radial frequency (cycles/px), over
    integer-radius rings of the 2-D FFT between f_lo and f_hi, averaged over images."""
    n = images.shape[-1]
    amp = np.zeros((n, n))
    for img in images:
        amp += np.abs(np.fft.fft2(img - img.mean()))
    f = np.hypot(*np.meshgrid(np.fft.fftfreq(n), np.fft.fftfreq(n)))
    ring = np.rint(f * n).astype(int)
    radii = np.arange(int(f_lo * n), int(f_hi * n) + 1)
    mean_amp = np.array([amp[ring == r].mean() for r in radii])
    return float(np.polyfit(np.log(radii / n), np.log(mean_amp), 1)[0])


def test_pink_noise_spectrum_falls_as_one_over_f():
    # Field (1987): natural images have amplitude spectra falling as 1/f (slope -1 in
    # log-log); our pink noise is built to match. White noise (exponent 0) is flat.
    imgs = np.stack([PinkNoise(0.5, 0.2).draw(rng(i), 128, 128, 1)[..., 0].astype(float) for i in range(8)])
    assert spectral_slope(imgs) == pytest.approx(-1.0, abs=0.1)  # Field (1987)
    flat = np.stack([PinkNoise(0.5, 0.2, exponent=0.0).draw(rng(i), 128, 128, 1)[..., 0].astype(float) for i in range(8)])
    assert spectral_slope(flat) == pytest.approx(0.0, abs=0.1)  # white noise: flat spectrum (from memory)
    steep = np.stack([PinkNoise(0.5, 0.2, exponent=2.0).field(rng(i), 128, 128)[0] for i in range(8)])
    assert spectral_slope(steep) == pytest.approx(-2.0, abs=0.1)
    gauss = np.stack([GaussianNoise(0.5, 0.1).draw(rng(i), 128, 128, 1)[..., 0].astype(float) for i in range(8)])
    assert spectral_slope(gauss) == pytest.approx(0.0, abs=0.1)  # independent pixels are white (from memory)


def test_pink_noise_mean_and_rms_contrast():
    # RMS contrast as standard deviation over mean intensity (Peli 1990).
    img = PinkNoise(0.4, 0.25).draw(rng(1), 96, 96, 1).astype(float) / 255
    assert img.mean() == pytest.approx(0.4, abs=0.005)
    assert img.std() / img.mean() == pytest.approx(0.25, rel=0.03)
    for synthesis in PinkNoise.SYNTHESES:  # exact up to single precision ("white": double)
        field = PinkNoise(0.4, 0.25, synthesis=synthesis).field(rng(1), 96, 96).astype(float)
        assert field.mean() == pytest.approx(0.4, abs=1e-6), synthesis
        assert field.std() / field.mean() == pytest.approx(0.25, rel=1e-5), synthesis


def test_noise_levels_and_ranges():
    u = UniformNoise(0.2, 0.6).draw(rng(), 200, 200, 3)
    assert u.min() >= round(0.2 * 255) and u.max() <= round(0.6 * 255)
    assert u.astype(float).mean() / 255 == pytest.approx(0.4, abs=0.005)
    # a uniform on [a, b] has sd (b - a) / sqrt(12) (from memory)
    assert u.astype(float).std() / 255 == pytest.approx(0.4 / np.sqrt(12), rel=0.03)
    assert (u[..., 0] == u[..., 2]).all()  # luminance noise: the same on every channel
    uc = UniformNoise(0.2, 0.6, per_channel=True).draw(rng(), 50, 50, 3)
    assert (uc[..., 0] != uc[..., 2]).mean() > 0.9
    g = GaussianNoise(0.5, 0.1).draw(rng(), 200, 200, 1).astype(float) / 255
    assert g.mean() == pytest.approx(0.5, abs=0.003) and g.std() == pytest.approx(0.1, rel=0.03)
    assert GaussianNoise(0.9, 0.5).draw(rng(), 30, 30, 1).max() == 255  # clipped, not wrapped


def test_solid_levels_and_bt601_grey():
    s = Solid((1.0, 0.5, 0.0))
    img = s.draw(rng(), 4, 5, 3)
    assert img.shape == (4, 5, 3) and img.dtype == np.uint8
    assert (img == [255, 128, 0]).all()
    grey = s.draw(rng(), 4, 5, 1)
    # OpenCV's RGB2GRAY uses the ITU-R BT.601 luma weights (OpenCV docs, cvtColor)
    ref = cv2.cvtColor(img, cv2.COLOR_RGB2GRAY)
    assert abs(int(grey[0, 0, 0]) - int(ref[0, 0])) <= 1
    assert (Solid(0.25).draw(rng(), 2, 2, 3) == 64).all()
    with pytest.raises(SpecError) as e:
        Solid(1.5)
    assert e.value.where == "background.value"


@pytest.mark.parametrize("bg", [Solid(0.3), UniformNoise(), GaussianNoise(), PinkNoise()], ids=repr)
def test_backgrounds_are_deterministic_per_stream(bg):
    assert isinstance(bg, Background)
    for channels in (1, 3):
        a = bg.draw(rng(7), 33, 47, channels)
        assert a.shape == (33, 47, channels) and a.dtype == np.uint8
        np.testing.assert_array_equal(a, bg.draw(rng(7), 33, 47, channels))
    if not isinstance(bg, Solid):
        assert not np.array_equal(bg.draw(rng(7), 33, 47, 3), bg.draw(rng(8), 33, 47, 3))


def _write(path: Path, img: np.ndarray) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    assert cv2.imwrite(str(path), img)
    return path


def test_image_folder_crops_and_enlarges(tmp_path):
    big = np.arange(120 * 150 * 3, dtype=np.uint32).reshape(120, 150, 3).astype(np.uint8)
    _write(tmp_path / "a_big.png", big[..., ::-1])  # written as BGR, read back as RGB
    _write(tmp_path / "b_small.png", np.full((10, 20, 3), 77, np.uint8))
    src = ImageFolder(tmp_path)
    seen_big = seen_small = False
    for seed in range(20):
        out = src.draw(rng(seed), 64, 48, 3)
        assert out.shape == (64, 48, 3)
        if (out == 77).all():
            seen_small = True
        else:
            # a crop is a window of the original, pixel for pixel
            matches = [(yy, xx) for yy in range(120 - 63) for xx in range(150 - 47)
                       if np.array_equal(big[yy:yy + 64, xx:xx + 48], out)]
            assert matches, f"crop {seed} is not a window of the source image"
            seen_big = True
    assert seen_big and seen_small
    grey = src.draw(rng(0), 64, 48, 1)
    assert grey.shape == (64, 48, 1)
    np.testing.assert_array_equal(src.draw(rng(5), 64, 48, 3), src.draw(rng(5), 64, 48, 3))


def test_image_folder_errors_name_the_file(tmp_path):
    with pytest.raises(SourceError, match="no images") as e:
        ImageFolder(tmp_path)
    assert e.value.where == str(tmp_path)
    _write(tmp_path / "ok.png", np.zeros((8, 8, 3), np.uint8))
    bad = tmp_path / "photo.jpg"
    bad.write_bytes(b"\xff\xd8 not really a jpeg")
    with pytest.raises(SourceError, match="not a readable image") as e:
        ImageFolder(tmp_path)
    assert e.value.where == str(bad) and "photo.jpg" in str(e.value)
    bad.write_bytes(b"")
    with pytest.raises(SourceError, match="0 bytes") as e:
        ImageFolder(tmp_path)
    assert e.value.where == str(bad)


# ---- the two pink-noise syntheses ---------------------------------------------------------------


def _white_reference(mean, contrast, exponent, seed, h, w, k=1):
    """Pink noise as every dataset before the `synthesis` key was made (kept here as the
    reference): float64 white noise, filtered by 1/f^exponent through rfft2 and irfft2."""
    r = np.random.default_rng(seed)
    fy = np.fft.fftfreq(h)[:, None]
    fx = np.fft.rfftfreq(w)[None, :]
    f = np.hypot(fx, fy)
    f[0, 0] = 1.0
    gain = f ** -exponent
    gain[0, 0] = 0.0
    shaped = np.fft.irfft2(np.fft.rfft2(r.standard_normal((k, h, w))) * gain, s=(h, w))
    shaped -= shaped.mean(axis=(1, 2), keepdims=True)
    sd = shaped.std(axis=(1, 2), keepdims=True)
    shaped /= np.where(sd > 0, sd, 1.0)
    v = mean * (1.0 + contrast * shaped)
    return np.clip(v * 255.0 + 0.5, 0, 255).astype(np.uint8)


@pytest.mark.parametrize("h,w,exponent,per_channel", [(96, 96, 1.0, False), (33, 47, 1.5, True), (64, 31, 0.5, False)])
def test_white_synthesis_remakes_the_earlier_pixels(h, w, exponent, per_channel):
    bg = PinkNoise(0.45, 0.2, exponent, per_channel, synthesis="white")
    for seed in range(6):
        for channels in (1, 3):
            got = bg.draw(rng(seed), h, w, channels)
            ref = _white_reference(0.45, 0.2, exponent, seed, h, w, channels if per_channel else 1)
            ref = np.repeat(np.moveaxis(ref, 0, -1), channels // ref.shape[0], axis=2)
            np.testing.assert_array_equal(got, ref)


@pytest.mark.parametrize("synthesis", ["grid", "polar", "spectrum"])
@pytest.mark.parametrize("h,w", [(32, 32), (31, 33), (24, 17)])
def test_coefficient_syntheses_have_the_power_spectrum_of_filtered_white_noise(h, w, synthesis):
    # The power of each rfft2 coefficient, averaged over many fields, must be the same for
    # both syntheses (a Gaussian field is fixed by its spectrum; reference: the DFT of
    # white noise has independent coefficients of equal power, from memory). Columns 0 and
    # w/2 are where drawing coefficients directly differs from filtering white noise.
    n = 1500
    power = {}
    for syn in (synthesis, "white"):
        bg, r = PinkNoise(0.5, 0.2, synthesis=syn), rng(3)
        p = np.zeros((h, w // 2 + 1))
        for _ in range(n):
            field = bg.field(r, h, w)[0].astype(np.float64)
            p += np.abs(np.fft.rfft2(field - field.mean())) ** 2
        power[syn] = p / p.sum()
    ratio = power[synthesis][1:] / power["white"][1:]  # row 0 holds the DC coefficient (zero)
    # each column's mean over its rows is within a few standard errors of 1 (about 1/sqrt(n)
    # per coefficient and estimate), the first and last column included
    cols = ratio.mean(axis=0)
    assert np.all(np.abs(cols - 1.0) < 0.05), cols
    # the overall mean: over seeds 3, 4 and 5 at 24x17 it spread by about 0.008 for "polar"
    # and "grid" alike (0.989 to 1.011), so 0.03 is about four standard deviations
    assert np.abs(ratio.mean() - 1.0) < 0.03


@pytest.mark.parametrize("synthesis", ["grid", "polar", "spectrum"])
def test_coefficient_syntheses_mean_contrast_and_gaussian_marginal(synthesis):
    bg = PinkNoise(0.4, 0.25, synthesis=synthesis)
    field = bg.field(rng(2), 96, 96)[0].astype(np.float64)
    assert field.mean() == pytest.approx(0.4, abs=1e-6)  # single precision
    assert field.std() / field.mean() == pytest.approx(0.25, rel=1e-5)  # RMS contrast (Peli 1990)
    # the marginal of a Gaussian field is normal: a few far-apart pixels of many fields,
    # standardised, against scipy's normal distribution (Kolmogorov-Smirnov)
    from scipy import stats

    z = np.concatenate([((bg.field(rng(s), 64, 64)[0] - 0.4) / 0.1)[::16, ::16].ravel() for s in range(60)])
    assert stats.kstest(z, "norm").pvalue > 0.001


def test_pink_noise_synthesis_is_named_in_the_spec_and_its_hash():
    from augsplit.spec import canonical, parse_spec, spec_hash
    import json

    base = {"seed": 1, "canvas": {"width": 32, "height": 32},
            "objects": {"kind": "polyomino", "cells": 2, "cell_px": 3},
            "background": {"kind": "pink_noise"},
            "splits": {"train": {"per_class": 1}}}
    spec = parse_spec(base)
    assert json.loads(canonical(spec))["background"]["synthesis"] == "grid"  # the default
    hashes = {spec_hash(spec)}
    for syn in ("polar", "spectrum", "white"):
        other = parse_spec({**base, "background": {"kind": "pink_noise", "synthesis": syn}})
        assert json.loads(canonical(other))["background"]["synthesis"] == syn
        hashes.add(spec_hash(other))
    assert len(hashes) == 4
    with pytest.raises(SpecError):
        PinkNoise(synthesis="fast")


# ---- the polar synthesis: tables and draws ------------------------------------------------------


def test_polar_tables_are_box_muller_at_the_midpoints():
    # Box and Muller (1958): for U uniform on (0, 1], sqrt(-2 ln U) is the Rayleigh amplitude
    # and 2 pi V the phase of a pair of independent standard normals.
    from augsplit.sources.backgrounds import POLAR_BITS, polar_tables

    amplitude, phase = polar_tables()
    n = 1 << POLAR_BITS
    u = (np.arange(n) + 0.5) / n
    np.testing.assert_allclose(amplitude, np.sqrt(-2.0 * np.log(u)), rtol=1e-7)
    np.testing.assert_allclose(phase, np.exp(2j * np.pi * u), atol=1e-7)
    # moments of the table distribution: E[R^2] = 2 (the exponential of mean 2, up to the
    # midpoint rule's error near 0), phasors of unit modulus summing to 0
    assert np.mean(amplitude.astype(np.float64) ** 2) == pytest.approx(2.0, abs=1e-3)
    assert abs(phase.astype(np.complex128).sum()) / n < 1e-6


def test_polar_draws_take_16_bit_indices_from_the_raw_stream_low_bits_first():
    # the indices are cut from the raw 64-bit outputs by shifts (a byte-order-free reference)
    from augsplit.sources.backgrounds import _polar_draws, polar_tables

    amplitude, phase = polar_tables()
    shape = (2, 5, 7)  # 70 coefficients: 140 indices, 35 raw outputs
    a, p = _polar_draws(rng(4), shape)
    raw = rng(4).bit_generator.random_raw(35)
    idx = np.array([(int(r) >> (16 * j)) & 0xFFFF for r in raw for j in range(4)])
    np.testing.assert_array_equal(a, amplitude[idx[:70]].reshape(shape))
    np.testing.assert_array_equal(p, phase[idx[70:]].reshape(shape))
    # and nothing more is taken from the stream
    r = rng(4)
    _polar_draws(r, shape)
    skip = rng(4)
    skip.bit_generator.random_raw(35)
    assert r.random() == skip.random()


@pytest.mark.parametrize("synthesis", PinkNoise.SYNTHESES)
def test_each_synthesis_is_the_same_field_for_the_same_stream(synthesis):
    bg = PinkNoise(0.5, 0.2, synthesis=synthesis)
    a, b = bg.draw(rng(9), 40, 30, 3), bg.draw(rng(9), 40, 30, 3)
    np.testing.assert_array_equal(a, b)
    assert not np.array_equal(a, bg.draw(rng(10), 40, 30, 3))
    others = [PinkNoise(0.5, 0.2, synthesis=o).draw(rng(9), 40, 30, 3) for o in PinkNoise.SYNTHESES if o != synthesis]
    assert not any(np.array_equal(a, o) for o in others)


# ---- the grid synthesis (the default) -------------------------------------------------------------


def test_grid_is_the_default():
    assert PinkNoise(0.5, 0.2).synthesis == "grid"
    from augsplit.spec import PinkNoiseBg

    assert PinkNoiseBg(kind="pink_noise").synthesis == "grid"


def test_grid_table_is_box_muller_on_a_grid_of_midpoints():
    # Box and Muller (1958): for U, V uniform on (0, 1], sqrt(-2 ln U) exp(2 pi i V) has
    # independent standard normal real and imaginary parts; here U and V each take 256
    # equally likely midpoints, so the table holds every pair once.
    from augsplit.sources.backgrounds import GRID_BITS, grid_table

    table = grid_table()
    n = 1 << GRID_BITS
    u = (np.arange(n) + 0.5) / n
    expected = (np.sqrt(-2.0 * np.log(u))[:, None] * np.exp(2j * np.pi * u)[None, :]).ravel()
    np.testing.assert_allclose(table, expected, rtol=2e-7, atol=1e-7)
    assert table.dtype == np.complex64 and not table.flags.writeable
    # moments of the table distribution: mean 0, E|Z|^2 = 2 (up to the midpoint rule's error
    # near u = 0), E[Z^2] = 0 (real and imaginary parts uncorrelated, of equal variance)
    z = table.astype(np.complex128)
    assert abs(z.mean()) < 1e-7
    assert np.mean(np.abs(z) ** 2) == pytest.approx(2.0, abs=0.01)
    assert abs(np.mean(z * z)) < 1e-7


def test_grid_draws_take_16_bit_indices_from_the_raw_stream_low_bits_first():
    # the indices are cut from the raw 64-bit outputs by shifts (a byte-order-free reference)
    from augsplit.sources.backgrounds import _grid_draws, grid_table

    shape = (2, 5, 7)  # 70 coefficients: 70 indices, 18 raw outputs (the last one half used)
    got = _grid_draws(rng(4), shape)
    raw = rng(4).bit_generator.random_raw(18)
    idx = np.array([(int(r) >> (16 * j)) & 0xFFFF for r in raw for j in range(4)])
    np.testing.assert_array_equal(got, grid_table()[idx[:70]].reshape(shape))
    assert got.flags.writeable and not np.shares_memory(got, grid_table())  # fresh: the gain goes in place
    r, skip = rng(4), rng(4)  # nothing more is taken from the stream
    _grid_draws(r, shape)
    skip.bit_generator.random_raw(18)
    assert r.random() == skip.random()


@pytest.mark.parametrize("scaled", [True, False])
@pytest.mark.parametrize("shape,width", [((1, 96, 49), 96), ((3, 31, 17), 33), ((2, 8, 5), 8), ((1, 1, 1), 1)])
def test_irfft2_is_scipys_bit_for_bit(monkeypatch, shape, width, scaled):
    # the package calls scipy's pocketfft binding directly; scipy.fft.irfft2 is the reference
    import scipy.fft

    from augsplit.sources import backgrounds

    r = rng(5)
    coef = (r.standard_normal(shape) + 1j * r.standard_normal(shape)).astype(np.complex64)
    expected = scipy.fft.irfft2(coef, s=(shape[1], width), norm=None if scaled else "forward")
    assert backgrounds._pocketfft_c2r() is not None  # the direct path is the one tested here
    got = backgrounds.irfft2(coef.copy(), width, scaled)
    assert got.dtype == expected.dtype and got.shape == expected.shape
    np.testing.assert_array_equal(got, expected)
    monkeypatch.setattr(backgrounds, "_pocketfft_c2r", lambda: None)  # a scipy laid out otherwise
    np.testing.assert_array_equal(backgrounds.irfft2(coef.copy(), width, scaled), expected)


def test_a_changed_private_fft_binding_is_not_used():
    # scipy's pocketfft binding is private: one that takes other arguments, or gives another
    # result, must be refused (checked against scipy.fft.irfft2) and the public path taken
    from scipy.fft._pocketfft import pypocketfft

    from augsplit.sources.backgrounds import _checked_c2r

    real = pypocketfft.c2r
    assert _checked_c2r(real) is real
    assert _checked_c2r(None) is None
    assert _checked_c2r(lambda a, axes, n, fwd, norm, out, threads, extra: real(a, axes, n, fwd, norm, out, threads)) is None
    assert _checked_c2r(lambda a, axes, n, fwd, norm, out, threads: real(a, axes, n, fwd, 2 - norm, out, threads)) is None
    assert _checked_c2r(lambda a, axes, n, fwd, norm, out, threads: real(a, axes, n, fwd, norm, out, threads).astype(float)) is None


@pytest.mark.parametrize("h,w,per_channel,channels", [(96, 96, False, 3), (33, 47, True, 3), (20, 64, False, 1)])
def test_grid_draw_is_its_field_rounded_half_up_and_clipped(h, w, per_channel, channels):
    # draw() scales, offsets and rounds in one pass, field() in full-scale fractions: they
    # agree to within float rounding at half-integers (one level, on a few pixels at most)
    bg = PinkNoise(0.45, 0.35, exponent=1.3, per_channel=per_channel)
    img = bg.draw(rng(6), h, w, channels)
    k = channels if per_channel else 1
    ref = np.clip(np.floor(bg.field(rng(6), h, w, k).astype(float) * 255 + 0.5), 0, 255)
    ref = np.repeat(np.moveaxis(ref, 0, -1), channels // k, axis=2)
    assert img.shape == (h, w, channels) and img.dtype == np.uint8
    diff = np.abs(img.astype(int) - ref)
    assert diff.max() <= 1 and np.count_nonzero(diff) <= 3
    assert img.min() == 0 or ref.min() > 0  # contrast 0.35 at mean 0.45 clips some pixels at 0 ...
    if not per_channel:
        assert (img == img[..., :1]).all()  # ... and luminance noise is the same on every channel


def test_grid_flat_and_tiny_canvases():
    # zero contrast: every pixel the mean; a 1x1 canvas has only the DC coefficient (gain 0)
    level = int(0.3 * 255 + 0.5)  # 76.5 rounds half up, as every background does
    assert (PinkNoise(0.3, 0.0).draw(rng(1), 16, 16, 3) == level).all()
    assert (PinkNoise(0.3, 0.2).draw(rng(1), 1, 1, 1) == level).all()
    big = PinkNoise(0.5, 0.2, exponent=4.0).field(rng(2), 64, 64)  # the steepest exponent allowed
    assert np.isfinite(big).all() and big.std() / big.mean() == pytest.approx(0.2, rel=1e-4)


GRID_DIGEST = "87fdf9d51309ea811c526b13440ee170793e93e01e941d5ee1fb2bb9348515ec"


def test_grid_bytes_are_pinned():
    # A dataset's stored spec names its synthesis and verify re-renders its images from it:
    # a change to the grid synthesis's bytes must be a new synthesis name, never a silent edit.
    # (digests of this commit's output; the other syntheses are pinned by
    # test_render_bytes_pinned against an older commit)
    import hashlib

    digest = hashlib.sha256()
    for seed, (h, w, c, pc) in enumerate([(96, 96, 3, False), (31, 45, 3, True), (64, 64, 1, False)]):
        digest.update(PinkNoise(0.5, 0.2, per_channel=pc).draw(rng(seed), h, w, c).tobytes())
    assert digest.hexdigest() == GRID_DIGEST

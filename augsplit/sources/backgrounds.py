"""Backgrounds: solid, uniform and Gaussian noise, 1/f ("pink") noise and random crops from a
folder of images. Each draws a uint8 (H, W, C) canvas from the generator it is given; the
canvas may be shared and read-only (a solid one is the same every time): the renderer copies it.

Intensities are fractions of full scale in [0, 1]; noise is luminance noise (the same on every
channel) unless `per_channel=True`. Grey canvases from colour inputs use BT.601 luma.
"""

from __future__ import annotations

import math
from functools import lru_cache
from pathlib import Path

import cv2
import numpy as np

from ..errors import SourceError, SpecError
from .base import LUMA_BT601, PixelBudget
from .folder import is_hidden, read_image, to_rgb


def _unit(value, where: str) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)) \
            or not 0.0 <= float(value) <= 1.0:
        raise SpecError(f"must be a number in [0, 1] (fraction of full scale), got {value!r}", where=where)
    return float(value)


def _quantise(v: np.ndarray) -> np.ndarray:
    """[0, 1] floats to uint8, rounding half up, clipping whatever falls outside."""
    return np.clip(v * 255.0 + 0.5, 0, 255).astype(np.uint8)


def _shape_channels(field: np.ndarray, channels: int, per_channel: bool) -> np.ndarray:
    """(C, H, W) or (1, H, W) floats to (H, W, channels)."""
    if channels not in (1, 3):
        raise ValueError(f"channels must be 1 or 3, got {channels}")
    if field.shape[0] != channels and field.dtype == np.uint8:  # one plane to three: cv2 is far faster
        return cv2.cvtColor(np.ascontiguousarray(field[0]), cv2.COLOR_GRAY2RGB)
    out = np.moveaxis(field, 0, -1)
    if out.shape[2] != channels:
        out = np.repeat(out[..., :1], channels, axis=2)
    return out


class Solid:
    """A constant canvas: a grey level in [0, 1] or an RGB triple of them."""

    def __init__(self, value=0.5):
        if np.isscalar(value):
            rgb = (_unit(value, "background.value"),) * 3
        else:
            vals = tuple(value)
            if len(vals) != 3:
                raise SpecError(f"must be a grey level or an RGB triple, got {value!r}", where="background.value")
            rgb = tuple(_unit(v, f"background.value[{i}]") for i, v in enumerate(vals))
        self.value = rgb
        self._rgb = _quantise(np.asarray(rgb))
        self._grey = _quantise(np.asarray([np.dot(rgb, LUMA_BT601)]))
        self._canvases: dict[tuple[int, int, int], np.ndarray] = {}  # one filled canvas per size

    def draw(self, rng: np.random.Generator, height: int, width: int, channels: int) -> np.ndarray:
        if channels not in (1, 3):
            raise ValueError(f"channels must be 1 or 3, got {channels}")
        key = (height, width, channels)
        canvas = self._canvases.get(key)
        if canvas is None:  # filling through broadcast_to is slow (a 3-value pattern); copying is not
            level = self._grey if channels == 1 else self._rgb
            canvas = self._canvases[key] = np.broadcast_to(level, key).copy()
            canvas.flags.writeable = False
        return canvas

    def __repr__(self) -> str:
        return f"Solid({self.value})"


class UniformNoise:
    """Independent uniform intensities in [lo, hi] per pixel."""

    def __init__(self, lo: float = 0.0, hi: float = 1.0, per_channel: bool = False):
        self.lo, self.hi = _unit(lo, "background.lo"), _unit(hi, "background.hi")
        if self.lo > self.hi:
            raise SpecError(f"lo {lo} is above hi {hi}", where="background.lo")
        self.per_channel = bool(per_channel)

    def draw(self, rng, height, width, channels):
        field = rng.uniform(self.lo, self.hi, size=(channels if self.per_channel else 1, height, width))
        return _shape_channels(_quantise(field), channels, self.per_channel)

    def __repr__(self) -> str:
        return f"UniformNoise(lo={self.lo}, hi={self.hi}, per_channel={self.per_channel})"


class GaussianNoise:
    """Independent normal intensities (mean, sd), clipped to [0, 1]."""

    def __init__(self, mean: float = 0.5, sd: float = 0.1, per_channel: bool = False):
        self.mean = _unit(mean, "background.mean")
        if isinstance(sd, bool) or not isinstance(sd, (int, float, np.integer, np.floating)) or sd < 0:
            raise SpecError(f"sd must be a non-negative number, got {sd!r}", where="background.sd")
        self.sd, self.per_channel = float(sd), bool(per_channel)

    def draw(self, rng, height, width, channels):
        field = rng.normal(self.mean, self.sd, size=(channels if self.per_channel else 1, height, width))
        return _shape_channels(_quantise(field), channels, self.per_channel)

    def __repr__(self) -> str:
        return f"GaussianNoise(mean={self.mean}, sd={self.sd}, per_channel={self.per_channel})"


def spectral_filter(height: int, width: int, exponent: float) -> np.ndarray:
    """Amplitude gain 1/f^exponent on the rfft2 grid (f in cycles per pixel); zero at DC."""
    fy = np.fft.fftfreq(height)[:, None]
    fx = np.fft.rfftfreq(width)[None, :]
    f = np.hypot(fx, fy)
    f[0, 0] = 1.0
    gain = f ** -exponent
    gain[0, 0] = 0.0
    return gain


class PinkNoise:
    """Gaussian noise shaped to an amplitude spectrum 1/f^exponent (exponent 1: "pink", the
    average spectrum of natural images, Field 1987), scaled to the given mean and RMS contrast
    (standard deviation / mean of intensity), then clipped to [0, 1].

    Four syntheses of the same process (their pixels differ): "grid" (the default) draws each
    Fourier coefficient as one of 65,536 equally likely complex values, a Rayleigh amplitude
    (256 quantiles) times a uniform phase (256 angles), from one 16-bit integer of the stream
    (Box and Muller 1958: independent normal real and imaginary parts), makes one inverse FFT,
    and scales, offsets, rounds and clips the field in a single pass; "polar" draws the
    amplitude and the phase from 16 bits each and normalises in separate passes (datasets
    made before "grid" existed); "spectrum" draws the coefficients' real and imaginary parts
    with numpy's normal generator, in single precision (datasets made before "polar" existed);
    "white" draws white noise in double precision and filters it (two FFTs), as every dataset
    made before the choice existed did."""

    SYNTHESES = ("grid", "polar", "spectrum", "white")

    def __init__(self, mean: float = 0.5, contrast: float = 0.2, exponent: float = 1.0, per_channel: bool = False,
                 synthesis: str = "grid"):
        self.mean = _unit(mean, "background.mean")
        if isinstance(contrast, bool) or not isinstance(contrast, (int, float)) or contrast < 0:
            raise SpecError(f"contrast must be a non-negative number, got {contrast!r}", where="background.contrast")
        if isinstance(exponent, bool) or not isinstance(exponent, (int, float)) or not 0 <= exponent <= 4:
            raise SpecError(f"exponent must be a number in [0, 4], got {exponent!r}", where="background.exponent")
        if synthesis not in self.SYNTHESES:
            raise SpecError(f"synthesis must be one of {', '.join(self.SYNTHESES)}, got {synthesis!r}",
                            where="background.synthesis")
        self.contrast, self.exponent = float(contrast), float(exponent)
        self.per_channel, self.synthesis = bool(per_channel), synthesis
        self._filters: dict[tuple[int, int], np.ndarray] = {}  # per canvas size; pure function of it

    def _gain(self, height: int, width: int) -> np.ndarray:
        gain = self._filters.get((height, width))
        if gain is None:
            gain = spectral_filter(height, width, self.exponent)
            if self.synthesis != "white":
                gain = coefficient_gain(gain, width)
                if self.synthesis == "grid":  # normalised afterwards: RMS 1 keeps sums of squares small
                    gain /= max(math.sqrt(np.mean(np.square(gain))), np.finfo(float).tiny)
                gain = gain.astype(np.float32)
                if self.synthesis != "polar":  # multiplies complex64 coefficients: numpy would cast
                    gain = gain.astype(np.complex64)  # it to this (imaginary 0) on every draw
            self._filters[(height, width)] = gain
        return gain

    def _shaped(self, rng: np.random.Generator, height: int, width: int, k: int) -> np.ndarray:
        """(k, H, W) zero-mean fields with the 1/f^exponent spectrum, before normalising."""
        gain = self._gain(height, width)
        if self.synthesis == "white":
            white = rng.standard_normal((k, height, width))
            return np.fft.irfft2(np.fft.rfft2(white) * gain, s=(height, width))
        if self.synthesis == "grid":
            coef = _grid_draws(rng, (k,) + gain.shape)
            coef *= gain
            return irfft2(coef, width, scaled=False)
        if self.synthesis == "polar":
            amplitude, phase = _polar_draws(rng, (k,) + gain.shape)
            amplitude *= gain
            coef = phase  # a fresh array from the table: the product goes in place
            coef *= amplitude
        else:  # real and imaginary parts of every rfft2 coefficient, as complex64
            coef = rng.standard_normal((k, height, 2 * gain.shape[1]), dtype=np.float32).view(np.complex64)
            coef *= gain
        return irfft2(coef, width)

    def field(self, rng: np.random.Generator, height: int, width: int, k: int = 1) -> np.ndarray:
        """(k, H, W) float fields with exactly the requested mean and RMS contrast (before
        clipping; to single precision for "grid", "polar" and "spectrum")."""
        shaped = self._shaped(rng, height, width, k)
        if self.synthesis == "grid":
            scale, offset = self._affine(shaped, 1.0)
            shaped *= scale
            shaped += offset
            return shaped
        shaped -= shaped.mean(axis=(1, 2), keepdims=True)
        if self.synthesis == "white":  # the arithmetic those datasets were made with
            sd = shaped.std(axis=(1, 2), keepdims=True)
            shaped /= np.where(sd > 0, sd, 1.0)
            return self.mean * (1.0 + self.contrast * shaped)
        sd = np.sqrt(np.square(shaped).mean(axis=(1, 2), keepdims=True))
        shaped *= (self.mean * self.contrast / np.where(sd > 0, sd, 1.0)).astype(np.float32)
        shaped += np.float32(self.mean)
        return shaped

    def _affine(self, shaped: np.ndarray, full_scale: float) -> tuple[np.ndarray, np.float32]:
        """The scale (per field) and offset that give zero-mean `shaped` fields ("grid": the
        DC coefficient is zero) the requested RMS contrast and mean, in units of `full_scale`."""
        ss = np.square(shaped).sum(axis=(1, 2))  # numpy's pairwise sums: no BLAS, the same on any CPU
        n, target = shaped.shape[1] * shaped.shape[2], full_scale * self.mean * self.contrast
        scale = [target * math.sqrt(n / float(x)) if x > 0 else 0.0 for x in ss]
        return np.array(scale, dtype=np.float32).reshape(-1, 1, 1), np.float32(full_scale * self.mean)

    def draw(self, rng, height, width, channels):
        if self.synthesis != "grid":
            field = self.field(rng, height, width, channels if self.per_channel else 1)
            return _shape_channels(_quantise(field), channels, self.per_channel)
        # "grid": scale, offset and round half up (as _quantise) in one pass over the field
        shaped = self._shaped(rng, height, width, channels if self.per_channel else 1)
        scale, offset = self._affine(shaped, 255.0)
        shaped *= scale
        shaped += offset + np.float32(0.5)
        # one pass; comparisons only (max then min, NaN kept), so the values of the two passes it replaced
        np.clip(shaped, 0, 255, out=shaped)
        return _shape_channels(shaped.astype(np.uint8), channels, self.per_channel)

    def __repr__(self) -> str:
        return (f"PinkNoise(mean={self.mean}, contrast={self.contrast}, exponent={self.exponent}, "
                f"per_channel={self.per_channel}, synthesis={self.synthesis!r})")


POLAR_BITS = 16  # resolution of the polar draws: 2**16 amplitudes and 2**16 phases


def _box_muller_midpoints(bits: int) -> tuple[list[float], list[float]]:
    """Rayleigh amplitudes sqrt(-2 ln u) and phase angles 2 pi u (Box and Muller 1958) at the
    2**bits midpoints u = (i + 1/2) / 2**bits, in double precision (Python's math module)."""
    n = 1 << bits
    mid = [(i + 0.5) / n for i in range(n)]
    return [math.sqrt(-2.0 * math.log(u)) for u in mid], [2.0 * math.pi * u for u in mid]


@lru_cache(maxsize=1)
def polar_tables() -> tuple[np.ndarray, np.ndarray]:
    """(Rayleigh amplitudes float32, unit phasors complex64), 2**POLAR_BITS each, at the
    midpoints u = (i + 1/2) / 2**POLAR_BITS: sqrt(-2 ln u) and exp(2 pi i u) (Box and Muller
    1958). Computed with Python's math module in double precision, then rounded to single,
    so the tables do not depend on numpy's vectorised functions of the machine."""
    n = 1 << POLAR_BITS
    radii, angles = _box_muller_midpoints(POLAR_BITS)
    amplitude = np.array(radii, dtype=np.float32)
    phase = np.empty(n, dtype=np.complex64)
    phase.real = np.array([math.cos(t) for t in angles], dtype=np.float32)
    phase.imag = np.array([math.sin(t) for t in angles], dtype=np.float32)
    amplitude.setflags(write=False)
    phase.setflags(write=False)
    return amplitude, phase


def _polar_draws(rng: np.random.Generator, shape: tuple[int, ...]) -> tuple[np.ndarray, np.ndarray]:
    """A table amplitude and a table phasor per coefficient: two 16-bit indices each, cut
    from the stream's raw 64-bit outputs (least significant bits first, on any byte order)."""
    n = int(np.prod(shape))
    raw = rng.bit_generator.random_raw(-(-2 * n // 4)).astype("<u8", copy=False)
    idx = raw.view("<u2")[:2 * n].astype(np.intp).reshape((2,) + shape)
    amplitude, phase = polar_tables()
    return np.take(amplitude, idx[0]), np.take(phase, idx[1])


GRID_BITS = 8  # the "grid" synthesis: 2**8 amplitudes times 2**8 phases, one 16-bit index


@lru_cache(maxsize=1)
def grid_table() -> np.ndarray:
    """2**(2 GRID_BITS) complex64 values, amplitude-major: Rayleigh amplitude i times unit
    phasor j at index i * 2**GRID_BITS + j, both at the midpoints u = (i + 1/2) / 2**GRID_BITS:
    sqrt(-2 ln u) and exp(2 pi i u) (Box and Muller 1958). Computed with Python's math module
    in double precision, then rounded to single once, so the table does not depend on numpy's
    vectorised functions of the machine."""
    n = 1 << GRID_BITS
    radii, angles = _box_muller_midpoints(GRID_BITS)
    re = [a * math.cos(t) for a in radii for t in angles]
    im = [a * math.sin(t) for a in radii for t in angles]
    table = np.empty(n * n, dtype=np.complex64)
    table.real, table.imag = np.array(re, dtype=np.float32), np.array(im, dtype=np.float32)
    table.setflags(write=False)
    return table


def _grid_draws(rng: np.random.Generator, shape: tuple[int, ...]) -> np.ndarray:
    """A fresh complex64 array of table values, one 16-bit index per coefficient cut from the
    stream's raw 64-bit outputs (least significant bits first, on any byte order)."""
    n = math.prod(shape)
    raw = rng.bit_generator.random_raw(-(-n // 4)).astype("<u8", copy=False)
    return np.take(grid_table(), raw.view("<u2")[:n]).reshape(shape)


def irfft2(coef: np.ndarray, width: int, scaled: bool = True) -> np.ndarray:
    """`scipy.fft.irfft2(coef, s=(H, width))` over the last two axes (`scaled=False`: with
    norm="forward", no 1/N): the same pocketfft call (a test holds them equal), without
    scipy's dispatch layers, which cost more than the transform of a small canvas. `coef` may
    be overwritten."""
    c2r = _pocketfft_c2r()
    if c2r is None:
        import scipy.fft

        return scipy.fft.irfft2(coef, s=(coef.shape[-2], width), norm=None if scaled else "forward",
                                overwrite_x=True)
    return c2r(coef, (coef.ndim - 2, coef.ndim - 1), width, False, 2 if scaled else 0, None, 1)


@lru_cache(maxsize=1)
def _pocketfft_c2r():
    """scipy's pocketfft binding (c2r(array, axes, last size, forward, norm: 0 none, 2 1/N,
    out, threads)), or None where this scipy lays it out otherwise or where it no longer
    gives scipy.fft.irfft2's result bit for bit (checked once per process: a private binding
    may change its arguments in any release)."""
    try:
        from scipy.fft._pocketfft import pypocketfft
    except ImportError:
        return None
    return _checked_c2r(getattr(pypocketfft, "c2r", None))


def _checked_c2r(c2r):
    """`c2r` if it equals scipy.fft.irfft2 on a small field, scaled and unscaled; else None."""
    if c2r is None:
        return None
    import scipy.fft

    rng = np.random.default_rng(0)
    coef = (rng.standard_normal((2, 6, 4)) + 1j * rng.standard_normal((2, 6, 4))).astype(np.complex64)
    try:
        for scaled, norm in ((True, None), (False, "forward")):
            got = c2r(coef.copy(), (1, 2), 7, False, 2 if scaled else 0, None, 1)
            want = scipy.fft.irfft2(coef, s=(6, 7), norm=norm)
            if not (isinstance(got, np.ndarray) and got.dtype == want.dtype and np.array_equal(got, want)):
                return None
    except Exception:  # noqa: BLE001 - any failure of a private binding means: do not use it
        return None
    return c2r


def coefficient_gain(gain: np.ndarray, width: int) -> np.ndarray:
    """The gain on independent standard normal real and imaginary parts of rfft2 coefficients
    that gives, through irfft2, the field of `gain` applied to white noise.

    White noise's coefficients have independent real and imaginary parts of equal variance,
    except that conjugate coefficients are tied; inside the rfft2 half-plane only columns 0
    and (even width) width/2 hold conjugate pairs. irfft2 keeps the Hermitian part of those
    columns, (X[k] + conj X[-k]) / 2, which halves the variance of independent draws there
    (a self-conjugate coefficient keeps its real part only: half as well). So those columns
    get sqrt(2) more gain; every coefficient then has the variance white noise gives it,
    up to one common factor (the fields are normalised afterwards)."""
    out = gain.copy()
    out[:, 0] *= math.sqrt(2.0)
    if width % 2 == 0:
        out[:, -1] *= math.sqrt(2.0)
    return out


class ImageFolder:
    """Random crops from the images in a folder (sorted by name; subfolders and dotfiles are
    ignored). An image smaller than the canvas is first enlarged (bilinear, keeping its aspect
    ratio) just enough to cover it. Every file is decoded when built and kept in memory."""

    def __init__(self, path):
        root = Path(path)
        if not root.is_dir():
            raise SourceError("background folder does not exist or is not a folder", where=str(root))
        files = sorted(p for p in root.iterdir() if p.is_file() and not is_hidden(p))
        if not files:
            raise SourceError("background folder has no images", where=str(root))
        self.path, self.files = root, tuple(files)
        budget = PixelBudget("MAX_BACKGROUND_PIXELS", "MAX_BACKGROUNDS_PIXELS")
        self._images = tuple(to_rgb(read_image(p, budget)) for p in files)  # read_image names any bad file
        self._grey: dict[int, np.ndarray] = {}

    def read_files(self) -> list[Path]:
        """Every file this source read, in order."""
        return list(self.files)

    def _image(self, i: int, channels: int) -> np.ndarray:
        if channels == 3:
            return self._images[i]
        if channels != 1:
            raise ValueError(f"channels must be 1 or 3, got {channels}")
        if i not in self._grey:
            self._grey[i] = cv2.cvtColor(self._images[i], cv2.COLOR_RGB2GRAY)[..., None]
        return self._grey[i]

    def draw(self, rng, height, width, channels):
        i = int(rng.integers(len(self._images)))
        img = self._image(i, channels)
        h, w = img.shape[:2]
        if h < height or w < width:
            f = max(height / h, width / w)
            size = (max(width, math.ceil(w * f)), max(height, math.ceil(h * f)))
            img = cv2.resize(img, size, interpolation=cv2.INTER_LINEAR).reshape(size[1], size[0], channels)
            h, w = img.shape[:2]
        y0 = int(rng.integers(h - height + 1))
        x0 = int(rng.integers(w - width + 1))
        return img[y0:y0 + height, x0:x0 + width].copy()

    def __repr__(self) -> str:
        return f"ImageFolder({str(self.path)!r})  # {len(self.files)} images"

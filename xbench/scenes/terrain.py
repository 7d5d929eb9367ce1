"""Terrain: fractal (1/f^beta) Gaussian fields by spectral synthesis, land-cover weights, hill shading.

Spectral synthesis (Saupe 1988, in Peitgen & Saupe, The Science of Fractal Images): white complex
Gaussian noise is shaped by an amplitude ``|k|^(-beta/2)`` (so the power spectrum falls as 1/f^beta) and
transformed back with an inverse FFT; the real and imaginary parts are two independent fields. Fields are
synthesised on a grid 1.5 times the tile size and cropped, so tiles are not periodic, and normalised by their
*theoretical* standard deviation (from the spectrum, not from the sample), so a tile's land-cover shares
vary naturally around the recipe's shares.
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np
from scipy import fft as sfft
from scipy.special import ndtri


@lru_cache(maxsize=64)
def _amplitude(n: int, beta: float, half: bool) -> tuple[np.ndarray, float, float]:
    """Amplitude |k|^(-beta/2) on an n x n FFT grid (or its rfft half); field std and gradient std."""
    fy = np.fft.fftfreq(n)
    fx = np.fft.rfftfreq(n) if half else fy
    kx, ky = np.meshgrid(fx, fy)
    k = np.hypot(kx, ky)
    k[0, 0] = 1.0
    amp = k ** (-beta / 2.0)
    amp[0, 0] = 0.0
    # per-pixel variance of the output is sum over the full grid of A^2 |Z|^2 / n^4 (E|Z|^2 = 2 for
    # Z = U1 + i U2 with unit-variance parts, and the real part takes half of it)
    full_k = np.hypot(*np.meshgrid(fy, fy))
    full_k[0, 0] = 1.0
    power = full_k ** (-beta)
    power[0, 0] = 0.0
    std = float(np.sqrt(power.sum())) / n**2
    # np.gradient's central difference has transfer function i sin(2 pi k)
    kxf = np.meshgrid(fy, fy)[0]
    gstd = float(np.sqrt((power * np.sin(2 * np.pi * kxf) ** 2).sum())) / n**2
    if half:
        # columns kx = 0 and kx = n/2 are their own mirror images: irfft2 keeps only their Hermitian
        # part, halving their variance, which the factor sqrt(2) restores
        amp[:, 0] *= np.sqrt(2.0)
        amp[:, -1] *= np.sqrt(2.0)
        # irfft2 of a half spectrum with independent re/im parts: each Hermitian pair counts once, so
        # the variance doubles relative to the complex transform's real part
        std *= np.sqrt(2.0)
        gstd *= np.sqrt(2.0)
    return amp.astype(np.float32), std, gstd


_SQRT3 = float(np.sqrt(3.0))


def _white(rng: np.random.Generator, shape: tuple[int, ...]) -> np.ndarray:
    """Unit-variance white noise, uniform on [-sqrt 3, sqrt 3]: after the transform every output pixel
    sums thousands of such terms, so the fields are Gaussian to a close approximation (central limit),
    at a fraction of the cost of drawing normal deviates."""
    u = rng.random(shape, dtype=np.float32)
    u -= 0.5
    u *= 2 * _SQRT3
    return u


def fft_size(size: int) -> int:
    """Synthesis grid: 1.5 times the tile, rounded up to a multiple of 8 (cropped to the tile after)."""
    return -(-(3 * size // 2) // 8) * 8


def white_pair(rng: np.random.Generator, size: int, pad: bool = True) -> np.ndarray:
    """The white noise of :func:`pair_from_white` (2, n, n) for one tile."""
    n = fft_size(size) if pad else size
    return _white(rng, (2, n, n))


def pair_from_white(z: np.ndarray, size: int, beta: float) -> tuple[np.ndarray, np.ndarray, float]:
    """Two independent unit-variance 1/f^beta fields (..., size, size) float32 and their gradient std,
    from white noise (..., 2, n, n): the real and imaginary parts of one complex inverse FFT of
    A (Z1 + i Z2). With n > size the fields are cropped from a larger grid (not periodic)."""
    n = z.shape[-1]
    amp, std, gstd = _amplitude(n, float(beta), False)
    spec = amp * (z[..., 0, :, :] + 1j * z[..., 1, :, :])
    field = sfft.ifft2(spec, axes=(-2, -1), overwrite_x=True)[..., :size, :size]
    inv = np.float32(1.0 / std)
    return field.real * inv, field.imag * inv, gstd / std


def white_field(rng: np.random.Generator, size: int) -> np.ndarray:
    """The white noise of :func:`field_from_white` (2, n, n // 2 + 1) for one tile."""
    n = fft_size(size)
    return _white(rng, (2, n, n // 2 + 1))


def field_from_white(z: np.ndarray, size: int, beta: float) -> tuple[np.ndarray, float]:
    """One unit-variance 1/f^beta field (..., size, size) float32 (real inverse FFT on a grid of
    :func:`fft_size`, cropped) and its gradient std, from white noise (..., 2, n, n // 2 + 1)."""
    n = z.shape[-2]
    amp, std, gstd = _amplitude(n, float(beta), True)
    spec = amp * (z[..., 0, :, :] + 1j * z[..., 1, :, :])
    field = sfft.irfft2(spec, s=(n, n), axes=(-2, -1), overwrite_x=True)[..., :size, :size]
    return field * np.float32(1.0 / std), gstd / std


def fractal_pair(
    rng: np.random.Generator, size: int, beta: float, pad: bool = True
) -> tuple[np.ndarray, np.ndarray, float]:
    """Two independent unit-variance 1/f^beta fields (size, size) float32, and their gradient std.

    ``pad=True`` synthesises on a larger grid (:func:`fft_size`) and crops (not periodic);
    ``pad=False`` on the tile itself (periodic; fine for small-scale texture, and cheaper).
    """
    return pair_from_white(white_pair(rng, size, pad), size, beta)


def fractal_field(rng: np.random.Generator, size: int, beta: float) -> tuple[np.ndarray, float]:
    """One unit-variance 1/f^beta field (size, size) float32 (real inverse FFT), and its gradient std."""
    return field_from_white(white_field(rng, size), size, beta)


def class_weights(elev: np.ndarray, shares: np.ndarray, edge: float) -> np.ndarray:
    """Soft land-cover weights (K, ...) from an elevation field (...), classes ordered from low to high.

    Class k takes the elevations between the standard-normal quantiles of the cumulative shares; the
    boundaries are linear ramps ``edge`` standard deviations wide, so class edges are anti-aliased.
    The weights are non-negative and sum to 1 in every pixel.
    """
    cum = np.cumsum(shares)[:-1]
    cum = np.clip(cum, 1e-6, 1 - 1e-6)
    thr = ndtri(cum).astype(np.float32)
    # below[k] = share of pixel under threshold k (1 deep below, 0 well above)
    thr = thr.reshape((-1,) + (1,) * elev.ndim)
    below = (thr - elev[None]) * np.float32(1.0 / max(edge, 1e-6)) + np.float32(0.5)
    np.minimum(below, 1.0, out=below)
    np.maximum(below, 0.0, out=below)
    k = len(shares)
    w = np.empty((k,) + elev.shape, dtype=np.float32)
    w[0] = below[0] if k > 1 else 1.0
    for i in range(1, k - 1):
        w[i] = below[i] - below[i - 1]
    if k > 1:
        w[k - 1] = 1.0 - below[k - 2]
    np.maximum(w, 0.0, out=w)
    return w


def hillshade(elev: np.ndarray, gstd: float, azimuth: float = 2.36) -> np.ndarray:
    """Unit-variance directional slope (light from the north-west by default): central differences
    inside the tile (as np.gradient), edge rows and columns copied from their neighbours."""
    cx = np.float32(0.5 * np.cos(azimuth) / max(gstd, 1e-9))
    cy = np.float32(0.5 * np.sin(azimuth) / max(gstd, 1e-9))
    s = np.empty_like(elev)
    inner = s[..., 1:-1, 1:-1]
    np.subtract(elev[..., 1:-1, 2:], elev[..., 1:-1, :-2], out=inner)
    inner *= cx
    inner += cy * (elev[..., 2:, 1:-1] - elev[..., :-2, 1:-1])
    s[..., 0, 1:-1], s[..., -1, 1:-1] = s[..., 1, 1:-1], s[..., -2, 1:-1]
    s[..., :, 0], s[..., :, -1] = s[..., :, 1], s[..., :, -2]
    return s

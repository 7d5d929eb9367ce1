"""Geometry: anti-aliased coverage of polygons, discs and stroked polylines, plus shape generators.

Coordinates are in pixels: x grows to the right (columns), y downwards (rows); pixel (r, c) is the unit
square x in [c, c+1), y in [r, r+1). Coverage is the fraction of a pixel's area inside the shape. It is
computed on ``SUBROWS`` horizontal scanlines per pixel row, exactly in x on each scanline (the span
lengths are integrated analytically), then averaged and quantised to multiples of ``1 / QUANTUM``.
Everything is vectorised with numpy: one call per shape, no Python loop over pixels.

Pieces of one shape (a road and its branches) are accumulated together; where they overlap inside a
pixel the sum is clipped to 1, a slight overestimate at junction pixels only.

A coverage raster is returned as :class:`Patch` (a crop with its offset) because most shapes are small.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

SUBROWS = 8
QUANTUM = 64


@dataclass
class Patch:
    """Coverage of one shape: ``cov`` float32 (h, w) placed at rows r0.., columns c0.. of the tile."""

    r0: int
    c0: int
    cov: np.ndarray

    @property
    def r1(self) -> int:
        return self.r0 + self.cov.shape[0]

    @property
    def c1(self) -> int:
        return self.c0 + self.cov.shape[1]

    def full(self, height: int, width: int) -> np.ndarray:
        out = np.zeros((height, width), dtype=np.float32)
        out[self.r0 : self.r1, self.c0 : self.c1] = self.cov
        return out

    def area(self) -> float:
        return float(self.cov.sum(dtype=np.float64))


def shoelace_area(poly: np.ndarray) -> float:
    """Signed area of a polygon (positive when counter-clockwise in x-right, y-up axes)."""
    x, y = poly[:, 0], poly[:, 1]
    return 0.5 * float(np.dot(x[:-1], y[1:]) - np.dot(x[1:], y[:-1]) + x[-1] * y[0] - x[0] * y[-1])


def _bbox(xmin: float, xmax: float, ymin: float, ymax: float, height: int, width: int):
    r0 = max(0, int(np.floor(ymin)))
    r1 = min(height, int(np.ceil(ymax)))
    c0 = max(0, int(np.floor(xmin)))
    c1 = min(width, int(np.ceil(xmax)))
    if r0 >= r1 or c0 >= c1:
        return None
    return r0, r1, c0, c1


def _finish(acc: np.ndarray, r0: int, c0: int, ncol: int) -> Patch | None:
    """Integrate the step accumulator along x, clip to [0, 1], quantise."""
    cov = np.cumsum(acc, axis=1)[:, :ncol]
    np.minimum(cov, 1.0, out=cov)
    np.maximum(cov, 0.0, out=cov)
    cov *= QUANTUM
    np.rint(cov, out=cov)
    cov *= 1.0 / QUANTUM
    if not cov.any():
        return None
    return Patch(r0, c0, cov.astype(np.float32))


def _accumulate(rows: np.ndarray, x: np.ndarray, d: np.ndarray, nrow: int, ncol: int) -> np.ndarray:
    """Step accumulator (nrow, ncol + 2): each crossing (sub-row, x, direction) adds a step of d at x.

    The integral of a unit step at x over pixel j is clip(j + 1 - x, 0, 1); as a difference array that
    is (j + 1 - x) at j = floor(x) and (x - j) at j + 1, so a cumulative sum along x gives the exact
    covered length of every pixel on the scanline. Sub-rows are averaged into their pixel row before
    the sum (both operations are linear), so the coverage of overlapping pieces adds up and is clipped.
    """
    xl = np.minimum(np.maximum(x, 0.0), float(ncol))
    j = xl.astype(np.int64)
    frac = xl - j
    width = ncol + 2
    base = (rows // SUBROWS) * width + j
    size = nrow * width
    w = d * (1.0 / SUBROWS)
    acc = np.bincount(base, weights=w - w * frac, minlength=size)
    acc += np.bincount(base + 1, weights=w * frac, minlength=size)
    return acc.reshape(nrow, width)


def polygons_coverage(polys: list[np.ndarray], height: int, width: int) -> Patch | None:
    """Coverage of the union of polygons (each (M, 2) of x, y vertices); None when nothing is inside.

    Each polygon is oriented so its inside has winding +1; overlapping polygons add up and the pixel
    coverage is clipped to 1 (exact for a single simple polygon and for disjoint pieces).
    """
    a_list, b_list = [], []
    for p in polys:
        if len(p) < 3:
            continue
        p = np.asarray(p, dtype=np.float64)
        if shoelace_area(p) < 0:
            p = p[::-1]
        a_list.append(p)
        b_list.append(np.concatenate([p[1:], p[:1]]))
    if not a_list:
        return None
    a = np.concatenate(a_list) if len(a_list) > 1 else a_list[0]
    b = np.concatenate(b_list) if len(b_list) > 1 else b_list[0]
    lo, hi = a.min(axis=0), a.max(axis=0)
    box = _bbox(lo[0], hi[0], lo[1], hi[1], height, width)
    if box is None:
        return None
    r0, r1, c0, c1 = box
    nrow, ncol = r1 - r0, c1 - c0
    nsub = nrow * SUBROWS
    # scaled units: x in pixels from column c0; sub-row k of the crop sits at y = k
    x0 = a[:, 0] - c0
    x1 = b[:, 0] - c0
    y0 = (a[:, 1] - r0) * SUBROWS - 0.5
    y1 = (b[:, 1] - r0) * SUBROWS - 0.5
    # an edge crosses the sub-rows k with min(y0, y1) <= k < max(y0, y1)
    ia = np.ceil(np.minimum(y0, y1)).clip(0, nsub).astype(np.int64)
    n = np.ceil(np.maximum(y0, y1)).clip(0, nsub).astype(np.int64) - ia
    total = int(n.sum())
    if total == 0:
        return None
    edge = np.repeat(np.arange(len(n)), n)
    rows = np.arange(total) - np.repeat(np.cumsum(n) - n - ia, n)
    slope = (x1 - x0) / np.where(y1 == y0, 1.0, y1 - y0)
    x = x0[edge] + (rows - y0[edge]) * slope[edge]
    # inside has positive signed area (x right, y down): edges going up (dy < 0) are left edges, so
    # the winding steps up by one to their right
    d = np.where(y1 < y0, 1.0, -1.0)[edge]
    acc = _accumulate(rows, x, d, nrow, ncol)
    return _finish(acc, r0, c0, ncol)


def disc_coverage(cx: float, cy: float, r: float, height: int, width: int) -> Patch | None:
    """Coverage of a disc (exact chord lengths on each scanline)."""
    if r <= 0:
        return None
    box = _bbox(cx - r, cx + r, cy - r, cy + r, height, width)
    if box is None:
        return None
    r0, r1, c0, c1 = box
    nrow, ncol = r1 - r0, c1 - c0
    nsub = nrow * SUBROWS
    k = np.arange(nsub)
    y = r0 + (k + 0.5) / SUBROWS
    h2 = r * r - (y - cy) ** 2
    inside = h2 > 0
    rows = k[inside]
    h = np.sqrt(h2[inside])
    xs = np.concatenate([cx - h - c0, cx + h - c0])
    ds = np.concatenate([np.ones_like(h), -np.ones_like(h)])
    acc = _accumulate(np.concatenate([rows, rows]), xs, ds, nrow, ncol)
    return _finish(acc, r0, c0, ncol)


def union_patches(patches: list[Patch | None], height: int, width: int) -> Patch | None:
    """Union of coverages as 1 - prod(1 - c) (independent sub-pixel placement), on the joint bbox."""
    ps = [p for p in patches if p is not None]
    if not ps:
        return None
    if len(ps) == 1:
        return ps[0]
    r0 = min(p.r0 for p in ps)
    c0 = min(p.c0 for p in ps)
    r1 = max(p.r1 for p in ps)
    c1 = max(p.c1 for p in ps)
    keep = np.ones((r1 - r0, c1 - c0), dtype=np.float32)
    for p in ps:
        keep[p.r0 - r0 : p.r1 - r0, p.c0 - c0 : p.c1 - c0] *= 1.0 - p.cov
    cov = np.rint((1.0 - keep) * QUANTUM) / QUANTUM
    return Patch(r0, c0, cov.astype(np.float32))


# ----------------------------------------------------------------------------------------------------
# shapes


def stroke_polygon(path: np.ndarray, half_width: float) -> np.ndarray:
    """The outline of a polyline of given half width (mitred joins, flat ends) as one polygon."""
    p = np.asarray(path, dtype=np.float64)
    seg = np.diff(p, axis=0)
    length = np.hypot(seg[:, 0], seg[:, 1])
    ok = length > 1e-9
    if not ok.all():
        p = np.concatenate([p[:1], p[1:][ok]])
        seg = np.diff(p, axis=0)
        length = np.hypot(seg[:, 0], seg[:, 1])
    tang = seg / length[:, None]
    nrm = np.stack([-tang[:, 1], tang[:, 0]], axis=1)
    # vertex normals: average of adjacent segment normals, lengthened to keep the strip width (mitre)
    vn = np.empty_like(p)
    vn[0], vn[-1] = nrm[0], nrm[-1]
    if len(p) > 2:
        avg = nrm[:-1] + nrm[1:]
        an = np.hypot(avg[:, 0], avg[:, 1])[:, None]
        avg = avg / np.maximum(an, 1e-9)
        cosang = np.sum(avg * nrm[1:], axis=1)
        vn[1:-1] = avg / np.maximum(cosang, 0.5)[:, None]
    left = p + vn * half_width
    right = p - vn * half_width
    return np.concatenate([left, right[::-1]])


def rectangle(cx: float, cy: float, length: float, width: float, angle: float) -> np.ndarray:
    """A rotated rectangle (length along ``angle``) as 4 vertices."""
    c, s = np.cos(angle), np.sin(angle)
    u = np.array([c, s]) * length / 2
    v = np.array([-s, c]) * width / 2
    ctr = np.array([cx, cy])
    return np.array([ctr - u - v, ctr + u - v, ctr + u + v, ctr - u + v])


def smooth_periodic(rng: np.random.Generator, n: int, smooth: int) -> np.ndarray:
    """A smooth periodic random sequence of length n with unit-ish amplitude (low Fourier modes)."""
    k = np.arange(1, smooth + 1)
    amp = 1.0 / k
    ph = rng.uniform(0, 2 * np.pi, smooth)
    co = rng.normal(size=smooth) * amp
    t = np.linspace(0, 2 * np.pi, n, endpoint=False)
    out = (co[None, :] * np.cos(k[None, :] * t[:, None] + ph[None, :])).sum(axis=1)
    return out / max(np.sqrt(0.5 * np.sum(amp**2)), 1e-9)


def blob(
    rng: np.random.Generator,
    cx: float,
    cy: float,
    radius: float,
    n_vertices: int,
    roughness: float,
    smooth: int,
) -> np.ndarray:
    """A star-shaped irregular polygon around (cx, cy): radius * exp(roughness * smooth noise)."""
    t = np.linspace(0, 2 * np.pi, n_vertices, endpoint=False)
    t = t + rng.uniform(-0.3, 0.3, n_vertices) * (2 * np.pi / n_vertices)
    t = np.sort(t)
    rad = radius * np.exp(roughness * smooth_periodic(rng, n_vertices, smooth))
    return np.stack([cx + rad * np.cos(t), cy + rad * np.sin(t)], axis=1)


def walk(
    rng: np.random.Generator,
    start: np.ndarray,
    heading: float,
    steps: int,
    step: float,
    wander: float,
    wavelength: tuple[float, float] = (25.0, 80.0),
) -> np.ndarray:
    """A smooth path: heading = base + wander * (sum of three random sinusoids in arc length).

    ``wander`` is the standard deviation of the heading around its base direction (radians); with
    wander below about 0.5 the path never turns back on itself.
    """
    s = np.arange(steps) * step
    lam = rng.uniform(wavelength[0], wavelength[1], 3)
    ph = rng.uniform(0, 2 * np.pi, 3)
    a = rng.normal(size=3)
    dev = (a[None, :] * np.sin(2 * np.pi * s[:, None] / lam[None, :] + ph[None, :])).sum(axis=1)
    head = heading + wander * dev / np.sqrt(1.5)
    d = np.stack([np.cos(head), np.sin(head)], axis=1) * step
    return np.concatenate([start[None, :], start[None, :] + np.cumsum(d, axis=0)])


def clip_path(path: np.ndarray, size: int, margin: float) -> np.ndarray:
    """Cut a path at its first vertex beyond the tile (+ margin), keeping that vertex."""
    out = (path[:, 0] < -margin) | (path[:, 0] > size + margin) | (path[:, 1] < -margin) | (path[:, 1] > size + margin)
    out[0] = False
    idx = np.flatnonzero(out)
    return path if idx.size == 0 else path[: idx[0] + 1]

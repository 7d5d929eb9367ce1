"""Planting: geometry and look of each structure type, drawn from a recipe's catalogue entry.

Each planter takes its own random stream, the catalogue entry and a context (tile size, landscape fields,
roads planted so far) and returns :class:`Planted` pieces (raw coverage, look, JSON geometry). Sizes are in
pixels (10 m at the nominal resolution).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

from xbench.scenes import geometry as g
from xbench.scenes.recipes import Recipe, StructureSpec

STEP = 1.5  # path step, pixels
ROAD_WAVELENGTH = (30.0, 90.0)  # wavelengths of a road's heading wander, pixels
RIVER_WAVELENGTH = (18.0, 45.0)  # meander wavelengths, pixels

#: Drawing order (later types are drawn over earlier ones).
LAYERS = ("field", "clearing", "natural-gap", "outcrop", "river", "corridor", "road", "building")


@dataclass
class Planted:
    kind: str
    raw: g.Patch
    look: dict[str, Any]
    params: dict[str, Any]


@dataclass
class Context:
    size: int
    recipe: Recipe
    fields: dict[str, np.ndarray]
    roads: list[dict[str, Any]] = field(default_factory=list)  # {"path": (M, 2), "width": w}
    occupied: np.ndarray = field(default_factory=lambda: np.zeros((0, 0), dtype=np.float32))  # planted so far

    def __post_init__(self) -> None:
        self.occupied = np.zeros((self.size, self.size), dtype=np.float32)

    def occupy(self, pieces: list[Planted]) -> None:
        for pc in pieces:
            r = pc.raw
            self.occupied[r.r0 : r.r1, r.c0 : r.c1] += r.cov

    def on_land(self, patch: g.Patch | None) -> g.Patch | None:
        """The part of a shape that lies on land (a clearing or a cut strip stops at the shore; a river
        joins a lake). Roads are not clipped: they cross water on bridges and causeways."""
        if patch is None:
            return None
        land = self.fields["land"][patch.r0 : patch.r1, patch.c0 : patch.c1]
        cov = np.rint(patch.cov * land * g.QUANTUM) * np.float32(1.0 / g.QUANTUM)
        if not cov.any():
            return None
        return g.Patch(patch.r0, patch.c0, cov.astype(np.float32))

    def free_at(self, pts: np.ndarray) -> np.ndarray:
        n = self.size
        ij = np.minimum(np.maximum(pts.astype(int), 0), n - 1)
        return self.occupied[ij[:, 1], ij[:, 0]] == 0

    def land_at(self, pts: np.ndarray) -> np.ndarray:
        n = self.size
        ij = np.minimum(np.maximum(pts.astype(int), 0), n - 1)
        return self.fields["land"][ij[:, 1], ij[:, 0]]

    def elev_at(self, pts: np.ndarray) -> np.ndarray:
        n = self.size
        ij = np.minimum(np.maximum(pts.astype(int), 0), n - 1)
        return self.fields["elev"][ij[:, 1], ij[:, 0]]


def _u(rng: np.random.Generator, r: list[float]) -> float:
    return float(rng.uniform(r[0], r[1])) if r[1] > r[0] else float(r[0])


def _i(rng: np.random.Generator, r: list[int] | tuple[int, int]) -> int:
    return int(rng.integers(r[0], r[1] + 1))


def _look(
    recipe: Recipe,
    spec: StructureSpec,
    rng: np.random.Generator,
    material: str,
    second: str | None = None,
    mix: tuple | None = None,
) -> dict[str, Any]:
    """Per-instance spectrum: the material scaled by a brightness jitter in [1 - j, 1 + j]."""
    jit = 1.0 + spec.jitter * rng.uniform(-1.0, 1.0)
    look: dict[str, Any] = {"s1": (recipe.spectrum(material) * jit).astype(np.float32), "material": material}
    if second is not None and mix is not None:
        look["s2"] = (recipe.spectrum(second) * jit).astype(np.float32)
        look["mix"] = mix
        look["material2"] = second
    return look


def _r(a: np.ndarray, nd: int = 2) -> list:
    return np.round(np.asarray(a, dtype=np.float64), nd).tolist()


def _pick_point(
    rng: np.random.Generator, ctx: Context, score: str = "land", tries: int = 6, margin: float = 0.1
) -> np.ndarray:
    n = ctx.size
    pts = rng.uniform(margin * n, (1 - margin) * n, (tries, 2))
    s = ctx.land_at(pts) if score == "land" else ctx.elev_at(pts)
    s = s + 10.0 * ctx.free_at(pts)  # prefer ground where nothing was planted yet
    return pts[int(np.argmax(s))]


def _crossing_path(rng: np.random.Generator, n: int, wander: float, wavelength: tuple[float, float]) -> np.ndarray:
    """A path entering at a random border point, heading across the tile, cut where it leaves it."""
    side = int(rng.integers(4))
    t = rng.uniform(0.1, 0.9) * n
    start = [np.array([0.0, t]), np.array([n, t]), np.array([t, 0.0]), np.array([t, n])][side]
    start = start + rng.uniform(-2.0, 0.0) * np.array([[1, 0], [-1, 0], [0, 1], [0, -1]][side])
    aim = rng.uniform(0.25 * n, 0.75 * n, 2)
    heading = float(np.arctan2(aim[1] - start[1], aim[0] - start[0]))
    steps = int(3 * n / STEP)
    path = g.walk(rng, start, heading, steps, STEP, wander, wavelength)
    return g.clip_path(path, n, 3.0)


# ----------------------------------------------------------------------------------------------------


def plant_road(rng, spec: StructureSpec, ctx: Context) -> list[Planted]:
    p, n, out = spec.params, ctx.size, []
    for _ in range(_i(rng, spec.count)):
        best = None
        for _attempt in range(4):
            path = _crossing_path(rng, n, p["curvature"], ROAD_WAVELENGTH)
            wet = 1.0 - float(ctx.land_at(path).mean())
            if best is None or wet < best[1]:
                best = (path, wet)
            if wet <= 0.05 or rng.random() > p["avoid_water"]:
                break
        assert best is not None  # the loop runs at least once
        main = best[0]
        width = _u(rng, p["width"])
        paved = bool(rng.random() < p["paved_fraction"])
        if paved:
            width *= 1.3
        polys = [g.stroke_polygon(main, width / 2)]
        branches = []
        if rng.random() < p["branching"] and len(main) > 4:
            for _b in range(_i(rng, p["branches"])):
                inside = np.flatnonzero(
                    (main[:, 0] > 4) & (main[:, 0] < n - 4) & (main[:, 1] > 4) & (main[:, 1] < n - 4)
                )
                if inside.size < 2:
                    break
                k = int(rng.choice(inside[:-1]))
                d = main[k + 1] - main[k]
                head = float(np.arctan2(d[1], d[0])) + rng.choice([-1.0, 1.0]) * rng.uniform(0.8, 1.5)
                steps = max(2, int(_u(rng, p["branch_length"]) / STEP))
                br = g.clip_path(g.walk(rng, main[k], head, steps, STEP, 0.5 * p["curvature"], ROAD_WAVELENGTH), n, 3.0)
                bw = width * 0.8
                polys.append(g.stroke_polygon(br, bw / 2))
                branches.append({"path": _r(br), "width": round(bw, 3)})
        raw = g.polygons_coverage(polys, n, n)
        if raw is None:
            continue
        mat = p["paved_material"] if paved else p["unpaved_material"]
        ctx.roads.append({"path": main, "width": width})
        out.append(
            Planted(
                "road",
                raw,
                _look(ctx.recipe, spec, rng, mat),
                {
                    "paved": paved,
                    "material": mat,
                    "width": round(width, 3),
                    "path": _r(main),
                    "branches": branches,
                },
            )
        )
    return out


def plant_river(rng, spec: StructureSpec, ctx: Context) -> list[Planted]:
    p, n, out = spec.params, ctx.size, []
    for _ in range(_i(rng, spec.count)):
        path = _crossing_path(rng, n, p["meander"], RIVER_WAVELENGTH)
        width = _u(rng, p["width"])
        raw = ctx.on_land(g.polygons_coverage([g.stroke_polygon(path, width / 2)], n, n))
        if raw is None:
            continue
        out.append(
            Planted(
                "river",
                raw,
                _look(ctx.recipe, spec, rng, p["material"]),
                {"material": p["material"], "width": round(width, 3), "path": _r(path)},
            )
        )
    return out


def plant_corridor(rng, spec: StructureSpec, ctx: Context) -> list[Planted]:
    p, n, out = spec.params, ctx.size, []
    for _ in range(_i(rng, spec.count)):
        c = rng.uniform(0.2 * n, 0.8 * n, 2)
        angle = float(rng.uniform(0, np.pi))
        width = _u(rng, p["width"])
        poly = g.rectangle(c[0], c[1], 3 * n, width, angle)
        raw = ctx.on_land(g.polygons_coverage([poly], n, n))
        if raw is None:
            continue
        out.append(
            Planted(
                "corridor",
                raw,
                _look(ctx.recipe, spec, rng, p["material"]),
                {
                    "material": p["material"],
                    "width": round(width, 3),
                    "centre": _r(c),
                    "angle": round(angle, 4),
                },
            )
        )
    return out


def _blob_planter(kind: str):
    def plant(rng, spec: StructureSpec, ctx: Context) -> list[Planted]:
        p, n, out = spec.params, ctx.size, []
        for _ in range(_i(rng, spec.count)):
            centre = _pick_point(rng, ctx, "elev" if kind == "outcrop" else "land")
            area = _u(rng, p["area"])
            radius = float(np.sqrt(area / np.pi))
            nv = _i(rng, p["vertices"])
            smooth = 2 if kind == "clearing" else 5
            poly = g.blob(rng, centre[0], centre[1], radius, nv, p["roughness"], smooth)
            raw = ctx.on_land(g.polygons_coverage([poly], n, n))
            if raw is None:
                continue
            params: dict[str, Any] = {
                "vertices": _r(poly),
                "polygon_area": round(abs(g.shoelace_area(poly)), 3),
            }
            if kind == "clearing":
                regrowth = _u(rng, p["regrowth"])
                look = _look(ctx.recipe, spec, rng, p["material"], p["regrowth_material"], ("field", regrowth, 0.35))
                params.update(material=p["material"], regrowth=round(regrowth, 4))
            elif kind == "natural-gap":
                mat = str(rng.choice(p["materials"]))
                remnant = _u(rng, p["remnant"])
                matrix = max(ctx.recipe.landcover, key=lambda c: c.share).material
                look = _look(ctx.recipe, spec, rng, mat, matrix, ("field", remnant, 0.3))
                params.update(material=mat, remnant=round(remnant, 4))
            else:
                look = _look(ctx.recipe, spec, rng, p["material"])
                params.update(material=p["material"])
            out.append(Planted(kind, raw, look, params))
        return out

    return plant


def plant_field(rng, spec: StructureSpec, ctx: Context) -> list[Planted]:
    p, n, out = spec.params, ctx.size, []
    count = _i(rng, spec.count)
    origin = _pick_point(rng, ctx, "land", margin=0.0)
    theta = float(rng.uniform(0, np.pi))
    u = np.array([np.cos(theta), np.sin(theta)])
    v = np.array([-np.sin(theta), np.cos(theta)])
    length = _u(rng, p["length"])
    gap = rng.uniform(0.5, 1.5)
    for j in range(count):
        L = _u(rng, p["length"])
        W = _u(rng, p["width"])
        gx, gy = j % 2, j // 2
        c = origin + (gx - 0.5) * (length + gap) * u + gy * (W + gap) * v
        poly = g.rectangle(c[0], c[1], L, W, theta)
        raw = ctx.on_land(g.polygons_coverage([poly], n, n))
        if raw is None:
            continue
        mat = str(rng.choice(p["materials"]))
        row_angle = theta + (np.pi / 2 if rng.random() < 0.3 else 0.0)
        period = _u(rng, p["row_period"])
        amp = _u(rng, p["row_amplitude"])
        phase = float(rng.uniform(0, 2 * np.pi))
        look = _look(ctx.recipe, spec, rng, mat, p["soil_material"], ("rows", row_angle, period, amp, phase))
        out.append(
            Planted(
                "field",
                raw,
                look,
                {
                    "material": mat,
                    "centre": _r(c),
                    "length": round(L, 3),
                    "width": round(W, 3),
                    "angle": round(theta, 4),
                    "row_angle": round(float(row_angle), 4),
                    "row_period": round(period, 3),
                    "polygon": _r(poly),
                },
            )
        )
    return out


def plant_building(rng, spec: StructureSpec, ctx: Context) -> list[Planted]:
    p, n = spec.params, ctx.size
    out: list[Planted] = []
    count = _i(rng, spec.count)
    if ctx.roads:
        road = ctx.roads[int(rng.integers(len(ctx.roads)))]
        path, road_w = road["path"], road["width"]
    else:  # a farmstead along a track too small to map
        c = _pick_point(rng, ctx, "land")
        a = float(rng.uniform(0, np.pi))
        d = np.array([np.cos(a), np.sin(a)])
        path = c[None, :] + np.linspace(-n / 2, n / 2, 40)[:, None] * d[None, :]
        road_w = 0.5
    seg = np.diff(path, axis=0)
    seglen = np.hypot(seg[:, 0], seg[:, 1])
    arc = np.concatenate([[0.0], np.cumsum(seglen)])
    inside = (path[:, 0] > 2) & (path[:, 0] < n - 2) & (path[:, 1] > 2) & (path[:, 1] < n - 2)
    if not inside.any():
        return out
    lo, hi = arc[inside].min(), arc[inside].max()
    s = rng.uniform(lo, hi)
    sign = 1.0
    for _ in range(count):
        if s > hi:
            s = rng.uniform(lo, hi)
        k = min(max(int(np.searchsorted(arc, s)) - 1, 0), len(seg) - 1)
        t = (s - arc[k]) / max(seglen[k], 1e-9)
        pt = path[k] + t * seg[k]
        tang = seg[k] / max(seglen[k], 1e-9)
        nrm = np.array([-tang[1], tang[0]])
        L, W = _u(rng, p["length"]), _u(rng, p["width"])
        off = road_w / 2 + _u(rng, p["setback"]) + W / 2
        if rng.random() < 0.6:
            sign = -sign
        c = pt + sign * off * nrm
        angle = float(np.arctan2(tang[1], tang[0]))
        poly = g.rectangle(c[0], c[1], L, W, angle)
        raw = ctx.on_land(g.polygons_coverage([poly], n, n))
        s += _u(rng, p["spacing"])
        if raw is None:
            continue
        mat = str(rng.choice(p["materials"]))
        out.append(
            Planted(
                "building",
                raw,
                _look(ctx.recipe, spec, rng, mat),
                {
                    "material": mat,
                    "centre": _r(c),
                    "length": round(L, 3),
                    "width": round(W, 3),
                    "angle": round(angle, 4),
                    "polygon": _r(poly),
                },
            )
        )
    return out


PLANTERS = {
    "road": plant_road,
    "river": plant_river,
    "corridor": plant_corridor,
    "clearing": _blob_planter("clearing"),
    "natural-gap": _blob_planter("natural-gap"),
    "outcrop": _blob_planter("outcrop"),
    "field": plant_field,
    "building": plant_building,
}

"""A labelled 3D head model on a 1 mm grid, with partial volume at every tissue edge.

The model is a stack of simple solids (ellipsoids, capped cylinders, slabs) painted in order, each
later solid replacing what it covers. Each solid's occupancy of a voxel is a smooth fraction from
its approximate signed distance ``d`` (mm): ``f = clip(0.5 - d / voxel, 0, 1)``, which ramps over
one voxel across the surface, a first-order model of a box voxel straddling a flat edge. Painting
a per-tissue value through the stack (``S <- S (1 - f) + f v``) gives the partial-volume mixture
of the tissue values in every voxel.

Coordinates are DICOM patient coordinates (LPS, mm: +x patient left, +y posterior, +z superior).
Arrays are indexed ``[z, y, x]`` as SimpleITK's ``GetArrayFromImage`` returns them.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np

Vec3 = tuple[float, float, float]


# --------------------------------------------------------------------------------------------
# Solids: each gives an approximate signed distance (negative inside) and a bounding box.


@dataclass(frozen=True)
class Ellipsoid:
    center: Vec3
    semi_axes: Vec3

    def bounds(self) -> tuple[np.ndarray, np.ndarray]:
        c, a = np.asarray(self.center), np.asarray(self.semi_axes)
        return c - a, c + a

    def distance(self, x: np.ndarray, y: np.ndarray, z: np.ndarray) -> np.ndarray:
        cx, cy, cz = self.center
        ax, ay, az = self.semi_axes
        dx, dy, dz = (x - cx) / ax, (y - cy) / ay, (z - cz) / az
        q = np.sqrt(dx * dx + dy * dy + dz * dz)
        # Distance to the surface ~ (q - 1) / |grad q| (first order, exact for a sphere).
        grad = np.sqrt((dx / ax) ** 2 + (dy / ay) ** 2 + (dz / az) ** 2)
        with np.errstate(divide="ignore", invalid="ignore"):
            d = (q - 1.0) * q / grad
        return np.where(q > 1e-9, d, -min(ax, ay, az))


def Sphere(center: Vec3, radius: float) -> Ellipsoid:  # noqa: N802 - reads like a solid
    return Ellipsoid(center, (radius, radius, radius))


@dataclass(frozen=True)
class Cylinder:
    """A capped cylinder between two points."""

    start: Vec3
    end: Vec3
    radius: float

    def bounds(self) -> tuple[np.ndarray, np.ndarray]:
        p0, p1 = np.asarray(self.start), np.asarray(self.end)
        return np.minimum(p0, p1) - self.radius, np.maximum(p0, p1) + self.radius

    def distance(self, x: np.ndarray, y: np.ndarray, z: np.ndarray) -> np.ndarray:
        p0, p1 = np.asarray(self.start, float), np.asarray(self.end, float)
        length = float(np.linalg.norm(p1 - p0))
        u = (p1 - p0) / length
        rx, ry, rz = x - p0[0], y - p0[1], z - p0[2]
        t = rx * u[0] + ry * u[1] + rz * u[2]
        radial = np.sqrt(
            np.maximum((rx - t * u[0]) ** 2 + (ry - t * u[1]) ** 2 + (rz - t * u[2]) ** 2, 0)
        )
        return np.maximum(radial - self.radius, np.maximum(-t, t - length))


@dataclass(frozen=True)
class Slab:
    """The space within ``half_thickness`` of a plane, clipped to a bounding solid."""

    point: Vec3
    normal: Vec3
    half_thickness: float
    within: Ellipsoid

    def bounds(self) -> tuple[np.ndarray, np.ndarray]:
        return self.within.bounds()

    def distance(self, x: np.ndarray, y: np.ndarray, z: np.ndarray) -> np.ndarray:
        n = np.asarray(self.normal, float)
        n = n / np.linalg.norm(n)
        px, py, pz = self.point
        plane = np.abs((x - px) * n[0] + (y - py) * n[1] + (z - pz) * n[2]) - self.half_thickness
        return np.maximum(plane, self.within.distance(x, y, z))


@dataclass(frozen=True)
class Intersection:
    parts: tuple[Ellipsoid | Cylinder, ...]

    def bounds(self) -> tuple[np.ndarray, np.ndarray]:
        lows, highs = zip(*(p.bounds() for p in self.parts), strict=True)
        return np.max(lows, axis=0), np.min(highs, axis=0)

    def distance(self, x: np.ndarray, y: np.ndarray, z: np.ndarray) -> np.ndarray:
        return np.max([p.distance(x, y, z) for p in self.parts], axis=0)


Solid = Ellipsoid | Cylinder | Slab | Intersection


# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Grid:
    """An axis-aligned 1 mm (or other) grid in patient space; ``shape`` is (nz, ny, nx)."""

    origin: Vec3
    spacing: float
    shape: tuple[int, int, int]

    @classmethod
    def covering(cls, low: Vec3, high: Vec3, spacing: float = 1.0) -> Grid:
        n = [int(round((h - lo) / spacing)) + 1 for lo, h in zip(low, high, strict=True)]
        origin = (float(low[0]), float(low[1]), float(low[2]))
        return cls(origin, float(spacing), (n[2], n[1], n[0]))

    def axis(self, i: int) -> np.ndarray:
        """Coordinates (mm) along patient axis ``i`` (0 = x, 1 = y, 2 = z)."""
        n = self.shape[2 - i]
        return self.origin[i] + self.spacing * np.arange(n)

    def index_range(self, i: int, low: float, high: float) -> slice:
        n = self.shape[2 - i]
        lo = int(np.floor((low - self.origin[i]) / self.spacing)) - 1
        hi = int(np.ceil((high - self.origin[i]) / self.spacing)) + 2
        return slice(max(lo, 0), min(max(hi, 0), n))

    def points(self, box: tuple[slice, slice, slice]) -> tuple[np.ndarray, ...]:
        """Broadcastable (z, y, x) coordinate arrays of the voxel centres in ``box``."""
        zs, ys, xs = box
        z = self.axis(2)[zs][:, None, None]
        y = self.axis(1)[ys][None, :, None]
        x = self.axis(0)[xs][None, None, :]
        return x, y, z


@dataclass(frozen=True)
class Layer:
    """One painted solid: its tissue and its occupancy fractions inside ``box``."""

    tissue: str
    box: tuple[slice, slice, slice]
    fraction: np.ndarray  # float32, shape of the box


@dataclass(frozen=True)
class HeadModel:
    """The ordered layers of the model on ``grid``; the background is ``background``."""

    grid: Grid
    layers: tuple[Layer, ...]
    background: str = "air"

    @property
    def tissues(self) -> tuple[str, ...]:
        seen = dict.fromkeys([self.background, *(layer.tissue for layer in self.layers)])
        return tuple(seen)

    def paint(self, values: Mapping[str, float]) -> np.ndarray:
        """The partial-volume mixture of per-tissue ``values`` (missing tissues count 0)."""
        out = np.full(self.grid.shape, float(values.get(self.background, 0.0)), np.float32)
        for layer in self.layers:
            v = np.float32(values.get(layer.tissue, 0.0))
            region = out[layer.box]
            region += layer.fraction * (v - region)
        return out

    def fraction_of(self, tissues: Sequence[str] | str) -> np.ndarray:
        """The fraction of each voxel occupied by ``tissues`` (a name or several)."""
        names = [tissues] if isinstance(tissues, str) else list(tissues)
        return self.paint(dict.fromkeys(names, 1.0))


def build(grid: Grid, solids: Sequence[tuple[str, Solid]], background: str = "air") -> HeadModel:
    """Rasterize ``(tissue, solid)`` pairs, later ones painted over earlier ones."""
    layers = []
    for tissue, solid in solids:
        low, high = solid.bounds()
        box = (
            grid.index_range(2, low[2], high[2]),
            grid.index_range(1, low[1], high[1]),
            grid.index_range(0, low[0], high[0]),
        )
        if any(s.stop <= s.start for s in box):
            continue
        x, y, z = grid.points(box)
        d = solid.distance(x, y, z)
        frac = np.clip(0.5 - d / grid.spacing, 0.0, 1.0).astype(np.float32)
        frac = np.broadcast_to(frac, tuple(s.stop - s.start for s in box)).copy()
        layers.append(Layer(tissue, box, frac))
    return HeadModel(grid, tuple(layers), background)


# --------------------------------------------------------------------------------------------
# The normal anatomy. Dimensions are of an adult head scaled down a little (so the field of view
# stays small); the model is truncated to an axial slab through the orbits and the ventricles.

GRID_LOW: Vec3 = (-70.0, -84.0, -40.0)
GRID_HIGH: Vec3 = (70.0, 84.0, 40.0)

HEAD = Ellipsoid((0.0, 0.0, 0.0), (68.0, 82.0, 70.0))
SKULL = Ellipsoid((0.0, 0.0, 0.0), (58.0, 72.0, 60.0))
SUBARACHNOID = Ellipsoid((0.0, 0.0, 0.0), (53.0, 67.0, 55.0))
CORTEX = Ellipsoid((0.0, 0.0, 0.0), (50.0, 64.0, 52.0))
WHITE_MATTER = Ellipsoid((0.0, 0.0, 0.0), (45.0, 59.0, 47.0))


def _orbit(side: float) -> list[tuple[str, Solid]]:
    """One orbit; ``side`` -1 for the patient's right (-x in LPS), +1 for the left."""
    x = 30.0 * side
    z = -20.0
    return [
        ("bone", Ellipsoid((x, -44.0, z), (16.0, 20.0, 15.0))),
        ("fat", Ellipsoid((x, -44.0, z), (14.0, 18.0, 13.0))),
        ("extraocular muscle", Ellipsoid((x + 10.0 * side, -42.0, z), (4.0, 11.0, 4.5))),  # lateral
        ("extraocular muscle", Ellipsoid((x - 9.0 * side, -42.0, z), (4.0, 11.0, 4.5))),  # medial
        ("extraocular muscle", Ellipsoid((x, -42.0, z + 9.5), (4.5, 11.0, 3.0))),  # superior
        ("extraocular muscle", Ellipsoid((x, -42.0, z - 9.5), (4.5, 11.0, 3.0))),  # inferior
        ("optic nerve", Cylinder((x, -54.0, z), (x, -24.0, z), 3.0)),
        ("sclera", Sphere((x, -62.0, z), 11.5)),
        ("vitreous", Sphere((x, -62.0, z), 10.5)),
    ]


def anatomy() -> list[tuple[str, Solid]]:
    """The normal head, outermost first."""
    solids: list[tuple[str, Solid]] = [("fat", HEAD)]  # scalp (subcutaneous) fat
    for side in (-1.0, 1.0):
        temporalis = Ellipsoid((60.0 * side, -30.0, 14.0), (9.0, 20.0, 18.0))
        solids.append(("muscle", Intersection((temporalis, HEAD))))
    solids += [("bone", SKULL), ("CSF", SUBARACHNOID), ("gray matter", CORTEX)]
    # Sulci: CSF clefts through the cortical ribbon (the white matter is painted over them).
    for point, normal in [
        ((0.0, 8.0, 0.0), (0.0, 1.0, 0.35)),
        ((0.0, -28.0, 0.0), (0.0, 1.0, -0.2)),
        ((0.0, 36.0, 0.0), (0.0, 1.0, 0.1)),
        ((0.0, 0.0, 30.0), (0.15, 0.0, 1.0)),
    ]:
        solids.append(("CSF", Slab(point, normal, 1.0, CORTEX)))
    solids.append(("white matter", WHITE_MATTER))
    for side in (-1.0, 1.0):
        solids.append(("CSF", Ellipsoid((9.0 * side, 2.0, 12.0), (6.0, 22.0, 9.0))))
    for side in (-1.0, 1.0):
        solids += _orbit(side)
    return solids


def default_grid(spacing: float = 1.0) -> Grid:
    return Grid.covering(GRID_LOW, GRID_HIGH, spacing)

"""Generated benchmark scenes and the rays traced through them.

Three meshes, each at any triangle count and the same picture at every count, so the cost of a ray can
be compared across sizes:

- `displaced_sphere`: a cube-sphere (each cube face a grid, pushed out to the unit sphere through the
  equal-angle map u -> tan(pi u / 4)) whose radius is modulated by a sum of random plane waves; a closed
  surface, one layer deep, of nearly equal triangles.
- `triangle_soup`: randomly placed, randomly oriented triangles of mixed size in a cube; their total area
  is held constant, so a ray crosses about the same number of them (about three) at every count.
  The hard case for space partitioning: many triangles straddle any split. Being a volume, not a
  surface, its cost per ray grows faster than log N: a ray travels a fixed distance before its first
  hit, through leaves whose size shrinks like N^(-1/3).
- `terrain`: a heightfield on a square grid, height a sum of random plane waves with amplitude halving
  as frequency doubles (fractional Brownian motion in the sense of Mandelbrot & Van Ness (1968),
  "Fractional Brownian motions, fractional noises and applications", SIAM Review 10(4), 422-437;
  approximated here by a few random waves per octave). Seen from a low camera: a long grazing view.

Rays:

- `camera_rays`: one ray through the centre of each pixel of a pinhole camera (the conventions of
  `tracer.render.camera`: rows count from the top).
- `bounce_rays`: the diffuse bounce after the first hit. Hits of camera rays are drawn at random (with
  replacement, kept in pixel order), and a direction is drawn from the cosine-weighted hemisphere about
  the geometric normal facing the incoming ray (Malley's method: a uniform point on the unit disk lifted
  to the hemisphere; Pharr, Jakob & Humphreys, "Physically Based Rendering", 3rd ed., section 13.6.3),
  in the orthonormal basis of Duff, Burgess, Christensen, Hery, Kensler, Liani & Villemin (2017),
  "Building an Orthonormal Basis, Revisited", JCGT 6(1), 1-8, Listing 3. The origin is pushed off the
  surface along that normal so the ray does not find its own triangle again.

Everything is vectorised numpy and a pure function of its arguments (seeded `numpy.random.Generator`).
"""
from typing import NamedTuple

import numpy as np

from tracer.render.camera import C_FWD, C_POS, C_RIGHT, C_TAN_HALF, C_UP, camera_params
from tracer.scene.types import Camera

SURFACE_OFFSET = 1e-4   # bounce-ray origin offset, as a fraction of the scene's bounding-box diagonal
SOUP_LAYERS = 3.0       # mean number of soup triangles a ray crossing the cube passes through


class BenchScene(NamedTuple):
    name: str
    vertices: np.ndarray    # (V, 3) float64
    faces: np.ndarray       # (F, 3) int64, counter-clockwise seen from the front
    camera: Camera


def _pinhole(position, look_at, fov: float) -> Camera:
    position = np.asarray(position, np.float64)
    look_at = np.asarray(look_at, np.float64)
    return Camera(position, look_at, np.array([0.0, 1.0, 0.0]), float(fov), 0.0,
                  float(np.linalg.norm(look_at - position)))


def _plane_waves(points: np.ndarray, rng: np.random.Generator, octaves: int, waves_per_octave: int,
                 base_frequency: float, amplitude: float) -> np.ndarray:
    """Sum of random plane waves over (P, D) points; amplitude halves as frequency doubles."""
    dim = points.shape[1]
    total = np.zeros(len(points))
    for octave in range(octaves):
        directions = rng.normal(size=(waves_per_octave, dim))
        directions /= np.linalg.norm(directions, axis=1, keepdims=True)
        phases = rng.uniform(0.0, 2.0 * np.pi, waves_per_octave)
        frequency = base_frequency * 2.0 ** octave
        gain = amplitude * 0.5 ** octave / np.sqrt(waves_per_octave)
        total += gain * np.sin(frequency * (points @ directions.T) + phases).sum(axis=1)
    return total


def _grid_faces(rows: int, cols: int, offset: int = 0) -> np.ndarray:
    """(2 rows cols, 3) faces of a (rows + 1) x (cols + 1) vertex grid, vertex (i, j) at i (cols + 1) + j.

    With j along +x and i along +z the triangles are counter-clockwise seen from +y.
    """
    i, j = np.meshgrid(np.arange(rows), np.arange(cols), indexing="ij")
    a = (i * (cols + 1) + j).ravel() + offset
    b, c = a + 1, a + cols + 1
    d = c + 1
    return np.concatenate([np.stack([a, c, b], axis=1), np.stack([b, c, d], axis=1)]).astype(np.int64)


def displaced_sphere(n_triangles: int, seed: int = 1) -> BenchScene:
    """A bumpy closed sphere of about `n_triangles` triangles (12 k^2 for a k x k grid per cube face)."""
    k = max(1, int(round(np.sqrt(n_triangles / 12.0))))
    s = np.tan(np.linspace(-1.0, 1.0, k + 1) * (np.pi / 4.0))    # equal-angle cube map
    s[0], s[-1] = -1.0, 1.0     # tan(pi/4) rounds below 1: pin the cube edges so the faces meet exactly
    a, b = np.meshgrid(s, s, indexing="ij")
    a, b, one = a.ravel(), b.ravel(), np.ones((k + 1) ** 2)
    blocks, faces = [], []
    for axis in range(3):
        for sign in (-1.0, 1.0):
            p = np.empty(((k + 1) ** 2, 3))
            p[:, axis] = sign * one
            p[:, (axis + 1) % 3] = a
            p[:, (axis + 2) % 3] = b
            faces.append(_grid_faces(k, k, offset=len(blocks) * (k + 1) ** 2))
            blocks.append(p)
    directions = np.concatenate(blocks)
    directions /= np.linalg.norm(directions, axis=1, keepdims=True)
    faces = np.concatenate(faces)
    rng = np.random.default_rng(seed)
    radius = 1.0 + _plane_waves(directions, rng, octaves=4, waves_per_octave=4, base_frequency=3.0,
                                amplitude=0.12)
    vertices = directions * radius[:, None]
    # Face the grids outward: flip the triangles whose normal points towards the centre.
    tri = vertices[faces]
    normal = np.cross(tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 0])
    inward = np.einsum("ij,ij->i", normal, tri.sum(axis=1)) < 0.0
    faces[inward] = faces[inward][:, ::-1]
    camera = _pinhole([0.4, 0.8, 2.7], [0.0, 0.0, 0.0], 40.0)
    return BenchScene("sphere", vertices, faces, camera)


def triangle_soup(n_triangles: int, seed: int = 2) -> BenchScene:
    """`n_triangles` independent random triangles in the cube [-1, 1]^3 (sizes vary by a factor ~5)."""
    n = max(1, int(n_triangles))
    rng = np.random.default_rng(seed)
    centres = rng.uniform(-1.0, 1.0, size=(n, 1, 3))
    offsets = rng.normal(size=(n, 3, 3))
    offsets -= offsets.mean(axis=1, keepdims=True)
    offsets *= rng.lognormal(0.0, 0.5, size=(n, 1, 1))
    area = 0.5 * np.linalg.norm(np.cross(offsets[:, 1] - offsets[:, 0], offsets[:, 2] - offsets[:, 0]),
                                axis=1)
    # A randomly oriented flat triangle of area A shows A/2 on average to a ray direction (Cauchy's
    # projection formula for a two-sided surface), and the cube shows 4 across, so the mean number of
    # crossings per ray is total area / 8.
    target_area = 8.0 * SOUP_LAYERS
    offsets *= np.sqrt(target_area / max(area.sum(), 1e-300))
    vertices = (centres + offsets).reshape(-1, 3)
    faces = np.arange(3 * n, dtype=np.int64).reshape(n, 3)
    camera = _pinhole([0.3, 0.6, 3.1], [0.0, 0.0, 0.0], 40.0)
    return BenchScene("soup", vertices, faces, camera)


def terrain(n_triangles: int, seed: int = 3) -> BenchScene:
    """A heightfield over [-1, 1]^2 (x, z) of about `n_triangles` triangles (2 (k - 1)^2 on a k x k grid)."""
    cells = max(1, int(round(np.sqrt(n_triangles / 2.0))))
    ticks = np.linspace(-1.0, 1.0, cells + 1)
    z, x = np.meshgrid(ticks, ticks, indexing="ij")    # row i along z, column j along x
    ground = np.stack([x.ravel(), z.ravel()], axis=1)
    rng = np.random.default_rng(seed)
    height = _plane_waves(ground, rng, octaves=7, waves_per_octave=3, base_frequency=2.0, amplitude=0.22)
    vertices = np.stack([ground[:, 0], height, ground[:, 1]], axis=1)
    camera = _pinhole([0.0, 0.65, 1.45], [0.0, -0.3, -0.4], 55.0)
    return BenchScene("terrain", vertices, _grid_faces(cells, cells), camera)


SCENES = {"sphere": displaced_sphere, "soup": triangle_soup, "terrain": terrain}


def make_scene(name: str, n_triangles: int) -> BenchScene:
    """The generated scene `name` ("sphere", "soup", "terrain") at about `n_triangles` triangles."""
    if name not in SCENES:
        raise ValueError(f"unknown bench scene {name!r}; known: {', '.join(SCENES)}")
    return SCENES[name](int(n_triangles))


def camera_rays(camera: Camera, width: int, height: int) -> tuple[np.ndarray, np.ndarray]:
    """Pinhole rays through the pixel centres, row-major from the top row.

    Returns origins and unit directions, both (width * height, 3) float32.
    """
    if width < 1 or height < 1:
        raise ValueError(f"image size must be positive, got {width}x{height}")
    cam = camera_params(camera, width, height)
    aspect = width / height
    col = (np.arange(width) + 0.5) / width
    row = (np.arange(height) + 0.5) / height
    sx = np.tile((2.0 * col - 1.0) * cam[C_TAN_HALF] * aspect, height)
    sy = np.repeat((1.0 - 2.0 * row) * cam[C_TAN_HALF], width)
    directions = (cam[C_FWD:C_FWD + 3] + sx[:, None] * cam[C_RIGHT:C_RIGHT + 3]
                  + sy[:, None] * cam[C_UP:C_UP + 3])
    directions /= np.linalg.norm(directions, axis=1, keepdims=True)
    origins = np.broadcast_to(cam[C_POS:C_POS + 3], directions.shape)
    return np.ascontiguousarray(origins, np.float32), np.ascontiguousarray(directions, np.float32)


def bounce_rays(vertices: np.ndarray, faces: np.ndarray, origins: np.ndarray, directions: np.ndarray,
                hit_t: np.ndarray, hit_triangle: np.ndarray, count: int,
                seed: int = 7) -> tuple[np.ndarray, np.ndarray]:
    """`count` diffuse-bounce rays leaving the hits of the given rays (see the module docstring).

    vertices (V, 3), faces (F, 3); origins, directions (N, 3) of the incoming rays with their closest
    hits hit_t (N,) and hit_triangle (N,) (-1 on a miss). Returns origins and unit directions, both
    (count, 3) float32, or (0, 3) arrays when no ray hit anything.
    """
    hit_t = np.asarray(hit_t)
    hit_triangle = np.asarray(hit_triangle)
    hit_rays = np.flatnonzero(hit_triangle >= 0)
    if len(hit_rays) == 0 or count <= 0:
        return np.zeros((0, 3), np.float32), np.zeros((0, 3), np.float32)
    rng = np.random.default_rng(seed)
    pick = np.sort(rng.choice(hit_rays, size=int(count), replace=True))
    incoming = np.asarray(directions, np.float64)[pick]
    point = np.asarray(origins, np.float64)[pick] + hit_t[pick, None].astype(np.float64) * incoming
    tri = np.asarray(vertices, np.float64)[np.asarray(faces)[hit_triangle[pick]]]
    normal = np.cross(tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 0])
    normal /= np.maximum(np.linalg.norm(normal, axis=1, keepdims=True), 1e-300)
    facing = np.where(np.einsum("ij,ij->i", normal, incoming) > 0.0, -1.0, 1.0)   # against the ray
    normal *= facing[:, None]
    # Malley's method: uniform on the unit disk (r = sqrt(u1), phi = 2 pi u2), lifted to the hemisphere.
    u1, u2 = rng.random(len(pick)), rng.random(len(pick))
    r, phi = np.sqrt(u1), 2.0 * np.pi * u2
    local = np.stack([r * np.cos(phi), r * np.sin(phi), np.sqrt(np.maximum(0.0, 1.0 - u1))], axis=1)
    # Duff et al. 2017, Listing 3: tangent frame (b1, b2, n) without a branch on n.z's sign.
    nx, ny, nz = normal[:, 0], normal[:, 1], normal[:, 2]
    sign = np.where(nz >= 0.0, 1.0, -1.0)
    a = -1.0 / (sign + nz)
    b = nx * ny * a
    b1 = np.stack([1.0 + sign * nx * nx * a, sign * b, -sign * nx], axis=1)
    b2 = np.stack([b, sign + ny * ny * a, -ny], axis=1)
    out_dir = local[:, :1] * b1 + local[:, 1:2] * b2 + local[:, 2:] * normal
    out_dir /= np.linalg.norm(out_dir, axis=1, keepdims=True)
    verts = np.asarray(vertices, np.float64)
    diagonal = float(np.linalg.norm(verts.max(axis=0) - verts.min(axis=0))) if len(verts) else 1.0
    out_origin = point + (SURFACE_OFFSET * max(diagonal, 1e-12)) * normal
    return np.ascontiguousarray(out_origin, np.float32), np.ascontiguousarray(out_dir, np.float32)

"""Slow, obvious reference code that the fast kernels are checked against.

Ray/triangle intersection: Möller & Trumbore (1997), "Fast, Minimum Storage Ray-Triangle
Intersection", Journal of Graphics Tools 2(1), 21-28, evaluated in float64, every ray against every
triangle, no structure. Pinhole camera: one Python loop iteration per pixel, straight from the
definitions of INTERFACE.md (vertical field of view, row 0 at the top).
"""
import math
from typing import NamedTuple

import numpy as np

RAYS_PER_BLOCK = 256        # rays tested against all triangles at once (bounds the (rays, tris) temporaries)
PARALLEL_DET = 1e-14        # |det| below this (relative to |e1| |e2| |d|) is a ray parallel to the plane


class NaiveHits(NamedTuple):
    t: np.ndarray           # (N,) float64 closest hit distance, inf on a miss
    triangle: np.ndarray    # (N,) int64 triangle id, -1 on a miss
    u: np.ndarray           # (N,) float64 barycentric weight of the second vertex
    v: np.ndarray           # (N,) float64 barycentric weight of the third vertex


def moller_trumbore(origins: np.ndarray, directions: np.ndarray, triangles: np.ndarray):
    """Every ray against every triangle, two-sided.

    origins, directions: (N, 3); triangles: (F, 3, 3) vertices. Returns t, u, v as (N, F) float64 with
    t = inf where the ray misses (hit point outside the closed triangle, ray parallel to its plane,
    or t <= 0).
    """
    o = np.asarray(origins, np.float64)[:, None, :]
    d = np.asarray(directions, np.float64)[:, None, :]
    tri = np.asarray(triangles, np.float64)
    v0 = tri[None, :, 0, :]
    e1 = tri[None, :, 1, :] - v0
    e2 = tri[None, :, 2, :] - v0
    p = np.cross(d, e2)
    det = np.sum(e1 * p, axis=-1)
    scale = np.linalg.norm(e1, axis=-1) * np.linalg.norm(e2, axis=-1) * np.linalg.norm(d, axis=-1)
    parallel = np.abs(det) <= PARALLEL_DET * scale
    inv_det = 1.0 / np.where(parallel, 1.0, det)
    s = o - v0
    u = np.sum(s * p, axis=-1) * inv_det
    q = np.cross(s, e1)
    v = np.sum(d * q, axis=-1) * inv_det
    t = np.sum(e2 * q, axis=-1) * inv_det
    inside = (u >= 0.0) & (v >= 0.0) & (u + v <= 1.0)
    t = np.where(~parallel & inside & (t > 0.0), t, np.inf)
    return t, u, v


def closest_hits(origins: np.ndarray, directions: np.ndarray, vertices: np.ndarray, faces: np.ndarray,
                 t_max=np.inf) -> NaiveHits:
    """Closest hit with 0 < t < t_max of each ray, by testing every triangle (float64)."""
    origins = np.asarray(origins, np.float64)
    directions = np.asarray(directions, np.float64)
    n = len(origins)
    t_max = np.broadcast_to(np.asarray(t_max, np.float64), (n,))
    triangles = np.asarray(vertices, np.float64)[np.asarray(faces)]
    out = NaiveHits(np.full(n, np.inf), np.full(n, -1, np.int64), np.zeros(n), np.zeros(n))
    for start in range(0, n, RAYS_PER_BLOCK):
        block = slice(start, min(n, start + RAYS_PER_BLOCK))
        t, u, v = moller_trumbore(origins[block], directions[block], triangles)
        t = np.where(t < t_max[block, None], t, np.inf)
        best = np.argmin(t, axis=1)
        rows = np.arange(len(best))
        hit = np.isfinite(t[rows, best])
        out.t[block] = np.where(hit, t[rows, best], np.inf)
        out.triangle[block] = np.where(hit, best, -1)
        out.u[block] = np.where(hit, u[rows, best], 0.0)
        out.v[block] = np.where(hit, v[rows, best], 0.0)
    return out


def plane_hit(origins: np.ndarray, directions: np.ndarray, triangles: np.ndarray):
    """Where each ray meets the plane of its own triangle (one triangle per ray, (N, 3, 3)).

    Returns t and the barycentric coordinates (w, u, v) of that point, float64, with no inside test:
    min(w, u, v) is then the (barycentric) distance of the point from the triangle's nearest edge,
    negative outside. Rays parallel to the plane get t = nan.
    """
    o = np.asarray(origins, np.float64)
    d = np.asarray(directions, np.float64)
    tri = np.asarray(triangles, np.float64)
    v0, e1, e2 = tri[:, 0], tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 0]
    p = np.cross(d, e2)
    det = np.sum(e1 * p, axis=-1)
    inv_det = np.where(det != 0.0, 1.0 / np.where(det != 0.0, det, 1.0), np.nan)
    s = o - v0
    u = np.sum(s * p, axis=-1) * inv_det
    q = np.cross(s, e1)
    v = np.sum(d * q, axis=-1) * inv_det
    t = np.sum(e2 * q, axis=-1) * inv_det
    return t, 1.0 - u - v, u, v


def pinhole_rays(position, look_at, up, fov_degrees: float, width: int, height: int, offset=(0.5, 0.5)):
    """Unit rays through the point (col + offset[0], row + offset[1]) of every pixel (its centre by
    default, (0, 0) its top-left corner), one pixel at a time.

    The camera looks from `position` at `look_at`; image right = forward x up, image up = right x forward
    (common practice for a right-handed camera); `fov_degrees` is the vertical field of view; row 0 is
    the top of the image (INTERFACE.md). Returns origins and directions, (height, width, 3) float64.
    """
    position = np.asarray(position, np.float64)
    forward = np.asarray(look_at, np.float64) - position
    forward /= np.linalg.norm(forward)
    right = np.cross(forward, np.asarray(up, np.float64))
    right /= np.linalg.norm(right)
    true_up = np.cross(right, forward)
    half_height = math.tan(math.radians(fov_degrees) / 2.0)
    half_width = half_height * width / height
    origins = np.empty((height, width, 3))
    directions = np.empty((height, width, 3))
    for row in range(height):
        for col in range(width):
            x = ((col + offset[0]) / width * 2.0 - 1.0) * half_width
            y = (1.0 - (row + offset[1]) / height * 2.0) * half_height
            direction = forward + x * right + y * true_up
            origins[row, col] = position
            directions[row, col] = direction / np.linalg.norm(direction)
    return origins, directions

"""Geometric probability, the ground the surface area heuristic stands on.

For isotropic uniformly random lines, the measure of the lines that meet a convex body is proportional
to its surface area (Cauchy-Crofton formula; Santalo 1976, "Integral Geometry and Geometric
Probability", ch. 13-14). So of the lines that meet a convex box P, the fraction that also meets a
convex box K inside P tends to SA(K) / SA(P), and of the lines that meet a ball B containing P, the
fraction that meets P tends to SA(P) / SA(B). This checks our random-line generator and the slab test
(through the BVH's root box) and the watertight triangle test against it.

Line generator (common practice for isotropic uniform random lines meeting a ball): a direction uniform
on the sphere, then a point uniform on the disk of the ball's radius perpendicular to it through the
ball's centre.
"""
import numpy as np
import trimesh

from tracer import build_accel

N_LINES = 400_000
SIGMAS = 4.0            # tolerance: binomial standard errors


def _random_lines(rng, centre, radius, n):
    d = rng.normal(size=(n, 3))
    d /= np.linalg.norm(d, axis=1, keepdims=True)
    # An orthonormal pair perpendicular to d, then a uniform point on the disk.
    helper = np.where(np.abs(d[:, :1]) < 0.9, [[1.0, 0.0, 0.0]], [[0.0, 1.0, 0.0]])
    e1 = np.cross(d, helper)
    e1 /= np.linalg.norm(e1, axis=1, keepdims=True)
    e2 = np.cross(d, e1)
    r = radius * np.sqrt(rng.random(n))
    phi = 2.0 * np.pi * rng.random(n)
    q = centre + e1 * (r * np.cos(phi))[:, None] + e2 * (r * np.sin(phi))[:, None]
    return q - d * (3.0 * radius), d          # start well outside the ball, run along the line


def _box(lo, hi):
    lo, hi = np.asarray(lo, float), np.asarray(hi, float)
    mesh = trimesh.creation.box(extents=hi - lo)
    mesh.apply_translation((lo + hi) / 2)
    return mesh


def _hits(mesh, origins, directions):
    accel = build_accel(mesh.vertices, mesh.faces, kind="bvh")
    return np.isfinite(accel.intersect(origins, directions).t)


def test_lines_meeting_a_box_inside_a_box_follow_the_surface_area_ratio():
    rng = np.random.default_rng(2024)
    outer = _box([0.0, 0.0, 0.0], [4.0, 2.0, 1.0])
    inner = _box([1.0, 0.5, 0.2], [2.0, 1.5, 0.6])
    centre = np.array([2.0, 1.0, 0.5])
    radius = float(np.linalg.norm([2.0, 1.0, 0.5]))              # the ball through P's corners
    origins, directions = _random_lines(rng, centre, radius, N_LINES)
    in_outer = _hits(outer, origins, directions)
    in_inner = _hits(inner, origins, directions)
    assert not np.any(in_inner & ~in_outer)                       # K inside P: every line meeting K meets P
    # SA(P) = 2 (4*2 + 2*1 + 4*1) = 28; SA(K) = 2 (1*1 + 1*0.4 + 1*0.4) = 3.6.
    expected = 3.6 / 28.0
    measured = in_inner.sum() / in_outer.sum()
    sigma = np.sqrt(expected * (1 - expected) / in_outer.sum())
    assert abs(measured - expected) < SIGMAS * sigma, (measured, expected, sigma)
    # And of the lines meeting the ball, the fraction meeting P is SA(P) / SA(ball) = 28 / (4 pi r^2).
    expected_p = 28.0 / (4.0 * np.pi * radius**2)
    sigma_p = np.sqrt(expected_p * (1 - expected_p) / N_LINES)
    assert abs(in_outer.mean() - expected_p) < SIGMAS * sigma_p, (in_outer.mean(), expected_p)


def test_lines_meeting_a_thin_slab_follow_its_surface_area():
    """A flat box (one extent near 0) is the case where surface area, not volume, decides."""
    rng = np.random.default_rng(7)
    outer = _box([-1.0, -1.0, -1.0], [1.0, 1.0, 1.0])
    slab = _box([-0.5, -0.5, -0.001], [0.5, 0.5, 0.001])
    origins, directions = _random_lines(rng, np.zeros(3), np.sqrt(3.0), N_LINES)
    in_outer = _hits(outer, origins, directions)
    in_slab = _hits(slab, origins, directions)
    # SA(slab) = 2 (1 + 0.002 + 0.002) = 2.008; SA(cube) = 24.
    expected = 2.008 / 24.0
    measured = in_slab.sum() / in_outer.sum()
    sigma = np.sqrt(expected * (1 - expected) / in_outer.sum())
    assert abs(measured - expected) < SIGMAS * sigma, (measured, expected, sigma)


def test_end_point_overlap_is_zero_for_disjoint_boxes_and_positive_for_nested_surfaces():
    """EPO (Aila, Karras & Laine 2013, eq. 3) by its definition: far-apart quads give disjoint boxes, so
    no surface lies in a box it does not belong to (EPO = 0); two concentric spheres cannot be separated
    by boxes (the inner one lies inside every box of the outer one's top nodes), so EPO > 0."""
    from tracer.accel.epo import bvh_epo
    quad = np.array([[0, 0, 0], [1, 0, 0], [1, 1, 0], [0, 1, 0]], float)
    faces = np.array([[0, 1, 2], [0, 2, 3]])
    accel = build_accel(np.vstack([quad, quad + [10.0, 0.0, 0.0]]), np.vstack([faces, faces + 4]),
                        kind="bvh", leaf_size=2)
    assert bvh_epo(accel.tree)[0] == 0.0
    outer = trimesh.creation.icosphere(subdivisions=2, radius=1.0)
    inner = trimesh.creation.icosphere(subdivisions=2, radius=0.5)
    vertices = np.vstack([outer.vertices, inner.vertices])
    faces = np.vstack([outer.faces, inner.faces + len(outer.vertices)])
    epo, stderr = bvh_epo(build_accel(vertices, faces, kind="bvh").tree)
    assert epo > 4 * stderr > 0.0

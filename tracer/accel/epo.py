"""End-point overlap (EPO) of a BVH: Aila, Karras & Laine (2013), "On quality metrics of bounding volume
hierarchies", High-Performance Graphics, 101-107, eq. 3:

    EPO = sum_n C(n) A((S \\ S(n)) ∩ box(n)) / A(S)

S is the scene's surface, S(n) the surface of the triangles below node n, A an area and C(n) the cost of
visiting n (C_TRAVERSE for an inner node, C_INTERSECT x its triangles for a leaf). It measures how much
geometry that does not belong to a node lies inside its box, where ray end points land and force the
node to be visited in vain; the paper finds it predicts ray-tracing cost better than the SAH cost.

Estimated by Monte Carlo: points uniform over the surface (a triangle chosen by area, a uniform point
on it); for each, every node whose box contains the point but whose subtree does not hold the point's
triangle adds C(n). The mean over points is the EPO, with its standard error.
"""
import numba
import numpy as np

from tracer.accel.stats import C_INTERSECT, C_TRAVERSE
from tracer.accel.tree import STACK_SIZE, Tree

EPO_SAMPLES = 1 << 16
EPO_SEED = 20130719


@numba.njit(cache=True, error_model="numpy")
def _subtree_ranges(nodes_i, ref_lo, ref_hi):
    """Range of references [lo, hi) under every 4-wide record (children follow their parents)."""
    for r in range(nodes_i.shape[0] - 1, -1, -1):
        lo, hi = 1 << 62, -1
        for k in range(4):
            count = nodes_i[r, 28 + k]
            link = nodes_i[r, 24 + k]
            if count > 0:
                lo, hi = min(lo, link), max(hi, link + count)
            elif count == 0:
                lo, hi = min(lo, ref_lo[link]), max(hi, ref_hi[link])
        ref_lo[r], ref_hi[r] = lo, hi


@numba.njit(cache=True, error_model="numpy", parallel=True)
def _epo_samples(nodes_f, nodes_i, ref_lo, ref_hi, points, point_ref, out):
    for m in numba.prange(points.shape[0]):
        px, py, pz = points[m, 0], points[m, 1], points[m, 2]
        own = point_ref[m]
        stack = np.empty(STACK_SIZE * 4, np.int64)
        stack[0] = 0
        top = 1
        total = 0.0
        while top > 0:
            top -= 1
            r = stack[top]
            for k in range(4):
                count = nodes_i[r, 28 + k]
                if count < 0:
                    continue
                inside = (nodes_f[r, k] <= px <= nodes_f[r, 4 + k]
                          and nodes_f[r, 8 + k] <= py <= nodes_f[r, 12 + k]
                          and nodes_f[r, 16 + k] <= pz <= nodes_f[r, 20 + k])
                if not inside:
                    continue
                link = nodes_i[r, 24 + k]
                if count > 0:
                    if not (link <= own < link + count):
                        total += C_INTERSECT * count
                else:
                    if not (ref_lo[link] <= own < ref_hi[link]):
                        total += C_TRAVERSE
                    if top < stack.shape[0]:
                        stack[top] = link
                        top += 1
        out[m] = total


def bvh_epo(tree: Tree, samples: int = EPO_SAMPLES, seed: int = EPO_SEED) -> tuple[float, float]:
    """(EPO, its standard error) of a 4-wide BVH `tree` (layout in tracer.accel.bvh / tree)."""
    tris = tree.leaf_tris.astype(np.float64).reshape(-1, 3, 3)
    if len(tris) == 0:
        return 0.0, 0.0
    area = 0.5 * np.linalg.norm(np.cross(tris[:, 1] - tris[:, 0], tris[:, 2] - tris[:, 0]), axis=1)
    if area.sum() <= 0.0:
        return 0.0, 0.0
    rng = np.random.default_rng(seed)
    chosen = np.minimum(np.searchsorted(np.cumsum(area) / area.sum(), rng.random(samples)), len(tris) - 1)
    s, t = np.sqrt(rng.random(samples)), rng.random(samples)
    w = np.stack([1.0 - s, s * (1.0 - t), s * t], axis=1)            # uniform on the triangle (Turk 1990)
    points = np.einsum("mk,mkj->mj", w, tris[chosen]).astype(np.float32)
    n_records = tree.nodes_i.shape[0]
    ref_lo = np.zeros(n_records, np.int64)
    ref_hi = np.zeros(n_records, np.int64)
    _subtree_ranges(tree.nodes_i, ref_lo, ref_hi)
    out = np.zeros(samples)
    _epo_samples(tree.nodes_f, tree.nodes_i, ref_lo, ref_hi, points, chosen.astype(np.int64), out)
    return float(out.mean()), float(out.std(ddof=1) / np.sqrt(samples))

"""Traversal kernels: closest hit and any hit through any `Tree`, counting the work done.

Every function returns the number of nodes visited (node records read and processed: inner nodes and
leaves) and triangles tested, so the integrator can write the cost heat maps. `closest_hit` and
`any_hit` dispatch on `tree.kind`, so the integrator is compiled once and traces through a BVH, a
kd-tree or no structure at all.

BVH traversal: explicit stack, both children's boxes tested at their parent, the nearer child visited
first and the farther pushed with its entry distance, skipped on pop once a closer hit is known
(common practice; e.g. Pharr, Jakob & Humphreys, "Physically Based Rendering", 3rd ed., section 4.3.4).
"""
import numba
import numpy as np

from tracer.accel._kdtraverse import kd_any_hit, kd_closest_hit
from tracer.accel._triangle import INF32, hit_box, hit_triangle, make_ray
from tracer.accel.tree import BVH, KDTREE, STACK_SIZE

F32 = np.float32


@numba.njit(cache=True, error_model="numpy")
def _bvh_closest_hit(tree, stack_i, stack_f, ray, t_max):
    nodes_f, nodes_i, leaf_tris = tree.nodes_f, tree.nodes_i, tree.leaf_tris
    t_best, best_k, best_u, best_v = t_max, -1, F32(0.0), F32(0.0)
    nodes, tris = 0, 0
    if hit_box(nodes_f, 0, ray, t_best) == INF32:
        return t_best, best_k, best_u, best_v, 1, 0
    n, top = 0, 0
    while True:
        nodes += 1
        count = nodes_i[n, 7]
        if count > 0:
            first = nodes_i[n, 6]
            for k in range(first, first + count):
                tris += 1
                t, u, v = hit_triangle(leaf_tris, k, ray, t_best)
                if t < t_best:
                    t_best, best_k, best_u, best_v = t, k, u, v
        else:
            left, right = n + 1, nodes_i[n, 6]
            t_left = hit_box(nodes_f, left, ray, t_best)
            t_right = hit_box(nodes_f, right, ray, t_best)
            if t_left != INF32 and t_right != INF32:
                if t_right < t_left:
                    left, right, t_left, t_right = right, left, t_right, t_left
                stack_i[top] = right
                stack_f[top, 0] = t_right
                top += 1
                n = left
                continue
            if t_left != INF32:
                n = left
                continue
            if t_right != INF32:
                n = right
                continue
        # Pop the nearest pending node that may still hold a closer hit.
        found = False
        while top > 0:
            top -= 1
            if stack_f[top, 0] < t_best:
                n = stack_i[top]
                found = True
                break
        if not found:
            break
    return t_best, best_k, best_u, best_v, nodes, tris


@numba.njit(cache=True, error_model="numpy")
def _bvh_any_hit(tree, stack_i, ray, t_max):
    nodes_f, nodes_i, leaf_tris = tree.nodes_f, tree.nodes_i, tree.leaf_tris
    nodes, tris = 0, 0
    if hit_box(nodes_f, 0, ray, t_max) == INF32:
        return False, 1, 0
    stack_i[0] = 0
    top = 1
    while top > 0:
        top -= 1
        n = stack_i[top]
        nodes += 1
        count = nodes_i[n, 7]
        if count > 0:
            first = nodes_i[n, 6]
            for k in range(first, first + count):
                tris += 1
                t, u, v = hit_triangle(leaf_tris, k, ray, t_max)
                if t < t_max:
                    return True, nodes, tris
        else:
            left, right = n + 1, nodes_i[n, 6]
            if hit_box(nodes_f, right, ray, t_max) != INF32:
                stack_i[top] = right
                top += 1
            if hit_box(nodes_f, left, ray, t_max) != INF32:
                stack_i[top] = left
                top += 1
    return False, nodes, tris


@numba.njit(cache=True, error_model="numpy")
def _brute_closest_hit(tree, ray, t_max):
    t_best, best_k, best_u, best_v = t_max, -1, F32(0.0), F32(0.0)
    count = tree.leaf_tris.shape[0]
    for k in range(count):
        t, u, v = hit_triangle(tree.leaf_tris, k, ray, t_best)
        if t < t_best:
            t_best, best_k, best_u, best_v = t, k, u, v
    return t_best, best_k, best_u, best_v, 0, count


@numba.njit(cache=True, error_model="numpy")
def _brute_any_hit(tree, ray, t_max):
    for k in range(tree.leaf_tris.shape[0]):
        t, u, v = hit_triangle(tree.leaf_tris, k, ray, t_max)
        if t < t_max:
            return True, 0, k + 1
    return False, 0, tree.leaf_tris.shape[0]


@numba.njit(cache=True, error_model="numpy")
def closest_hit(tree, stack_i, stack_f, ray, t_max):
    """Nearest hit with 0 < t < t_max: (t, reference, u, v, nodes visited, triangles tested).

    `reference` indexes tree.refs / tree.leaf_tris (-1 and t = t_max on a miss).
    """
    if tree.kind == BVH:
        return _bvh_closest_hit(tree, stack_i, stack_f, ray, t_max)
    if tree.kind == KDTREE:
        return kd_closest_hit(tree, stack_i, stack_f, ray, t_max)
    return _brute_closest_hit(tree, ray, t_max)


@numba.njit(cache=True, error_model="numpy")
def any_hit(tree, stack_i, stack_f, ray, t_max):
    """Whether anything lies at 0 < t < t_max: (hit, nodes visited, triangles tested)."""
    if tree.kind == BVH:
        return _bvh_any_hit(tree, stack_i, ray, t_max)
    if tree.kind == KDTREE:
        return kd_any_hit(tree, stack_i, stack_f, ray, t_max)
    return _brute_any_hit(tree, ray, t_max)


RAYS_PER_CHUNK = 256


@numba.njit(cache=True, error_model="numpy", parallel=True)
def intersect_rays(tree, origins, directions, t_max, want_closest, out_t, out_ref, out_u, out_v,
                   out_nodes, out_tris):
    """Trace N rays ((N, 3) float32) in parallel chunks; write the per-ray results into `out_*`.

    With `want_closest` False only occlusion is asked: out_t is 0 where something lies before t_max.
    """
    n_rays = origins.shape[0]
    n_chunks = (n_rays + RAYS_PER_CHUNK - 1) // RAYS_PER_CHUNK
    for chunk in numba.prange(n_chunks):
        stack_i = np.empty(STACK_SIZE, dtype=np.int32)
        stack_f = np.empty((STACK_SIZE, 2), dtype=np.float32)
        for i in range(chunk * RAYS_PER_CHUNK, min(n_rays, (chunk + 1) * RAYS_PER_CHUNK)):
            ray = make_ray(origins[i, 0], origins[i, 1], origins[i, 2],
                           directions[i, 0], directions[i, 1], directions[i, 2])
            if want_closest:
                t, k, u, v, nodes, tris = closest_hit(tree, stack_i, stack_f, ray, t_max[i])
                out_t[i] = t if k >= 0 else INF32
                out_ref[i] = k
                out_u[i] = u
                out_v[i] = v
            else:
                hit, nodes, tris = any_hit(tree, stack_i, stack_f, ray, t_max[i])
                out_t[i] = F32(0.0) if hit else INF32
                out_ref[i] = -1
            out_nodes[i] = nodes
            out_tris[i] = tris

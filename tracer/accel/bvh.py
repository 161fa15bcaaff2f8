"""Bounding volume hierarchy: binned SAH build and object-median build.

Binned SAH: Wald (2007), "On fast Construction of SAH-based Bounding Volume Hierarchies", IEEE
Symposium on Interactive Ray Tracing, 33-40. Triangle centroids are put into `N_BINS` equal bins over
the node's centroid bounds on each axis; the split plane between two bins with the lowest surface area
heuristic cost (Goldsmith & Salmon 1987; MacDonald & Booth 1990)

    C(split) = C_TRAVERSE + C_INTERSECT * (A(L) N(L) + A(R) N(R)) / A(P)

is taken, unless making the node a leaf (C_INTERSECT * N(P)) is no dearer and the node holds at most
`leaf_size` triangles. Nodes with more than `leaf_size` triangles are always split.

Median: the node's triangles are split into two halves of equal count at the median centroid along the
longest axis of the centroid bounds, down to `leaf_size` (the classic object-median build).

Nodes are written in depth-first order (left child = parent + 1), each leaf holding a contiguous range
of references, so a leaf reads consecutive triangles (see `tracer.accel.tree`).
"""
import numba
import numpy as np

from tracer.accel.tree import BVH, Tree, leaf_triangles, node_records, scene_bounds

N_BINS = 32
C_TRAVERSE = 1.0        # cost of visiting an inner node, relative to one triangle test (rayref: 1:1)
C_INTERSECT = 1.0
MAX_SAH_DEPTH = 64      # below this depth the build falls back to median splits, bounding tree depth
F32 = np.float32


@numba.njit(cache=True, error_model="numpy", inline="always")
def _half_area(lo0, lo1, lo2, hi0, hi1, hi2):
    dx, dy, dz = hi0 - lo0, hi1 - lo1, hi2 - lo2
    if dx < 0.0:
        return 0.0
    return dx * dy + dy * dz + dz * dx


@numba.njit(cache=True, error_model="numpy")
def _range_bounds(perm, start, end, tri_lo, tri_hi, centroid, box, cbox):
    """Box of the triangles perm[start:end] into box[0:6], box of their centroids into cbox[0:6]."""
    for a in range(3):
        box[a] = np.inf
        box[3 + a] = -np.inf
        cbox[a] = np.inf
        cbox[3 + a] = -np.inf
    for i in range(start, end):
        p = perm[i]
        for a in range(3):
            box[a] = min(box[a], tri_lo[p, a])
            box[3 + a] = max(box[3 + a], tri_hi[p, a])
            cbox[a] = min(cbox[a], centroid[p, a])
            cbox[3 + a] = max(cbox[3 + a], centroid[p, a])


@numba.njit(cache=True, error_model="numpy")
def _sah_split(perm, start, end, tri_lo, tri_hi, centroid, cbox, node_area, leaf_size, bin_count,
               bin_box, left_area, left_count):
    """Best binned-SAH split of perm[start:end]: (axis, bin, cost); axis -1 when no split is valid."""
    n_bins = bin_count.shape[1]
    bin_count[:] = 0
    for a in range(3):
        for b in range(n_bins):
            for j in range(3):
                bin_box[a, b, j] = np.inf
                bin_box[a, b, 3 + j] = -np.inf
    scale = np.empty(3)
    for a in range(3):
        extent = cbox[3 + a] - cbox[a]
        scale[a] = n_bins * (1.0 - 1e-6) / extent if extent > 0.0 else 0.0
    for i in range(start, end):
        p = perm[i]
        for a in range(3):
            if scale[a] == 0.0:
                continue
            b = min(int((centroid[p, a] - cbox[a]) * scale[a]), n_bins - 1)
            bin_count[a, b] += 1
            for j in range(3):
                bin_box[a, b, j] = min(bin_box[a, b, j], tri_lo[p, j])
                bin_box[a, b, 3 + j] = max(bin_box[a, b, 3 + j], tri_hi[p, j])
    best_axis, best_bin, best_cost = -1, 0, np.inf
    for a in range(3):
        if scale[a] == 0.0:
            continue
        # Sweep from the left: area and count of bins [0, b].
        lo0, lo1, lo2, hi0, hi1, hi2 = np.inf, np.inf, np.inf, -np.inf, -np.inf, -np.inf
        count = 0
        for b in range(n_bins - 1):
            lo0 = min(lo0, bin_box[a, b, 0])
            lo1 = min(lo1, bin_box[a, b, 1])
            lo2 = min(lo2, bin_box[a, b, 2])
            hi0 = max(hi0, bin_box[a, b, 3])
            hi1 = max(hi1, bin_box[a, b, 4])
            hi2 = max(hi2, bin_box[a, b, 5])
            count += bin_count[a, b]
            left_area[b] = _half_area(lo0, lo1, lo2, hi0, hi1, hi2)
            left_count[b] = count
        # Sweep from the right, evaluating the split after bin b - 1.
        lo0, lo1, lo2, hi0, hi1, hi2 = np.inf, np.inf, np.inf, -np.inf, -np.inf, -np.inf
        count = 0
        for b in range(n_bins - 1, 0, -1):
            lo0 = min(lo0, bin_box[a, b, 0])
            lo1 = min(lo1, bin_box[a, b, 1])
            lo2 = min(lo2, bin_box[a, b, 2])
            hi0 = max(hi0, bin_box[a, b, 3])
            hi1 = max(hi1, bin_box[a, b, 4])
            hi2 = max(hi2, bin_box[a, b, 5])
            count += bin_count[a, b]
            n_left = left_count[b - 1]
            if count == 0 or n_left == 0:
                continue
            right_area = _half_area(lo0, lo1, lo2, hi0, hi1, hi2)
            cost = C_TRAVERSE + C_INTERSECT * (left_area[b - 1] * n_left + right_area * count) / node_area
            if cost < best_cost:
                best_axis, best_bin, best_cost = a, b, cost
    return best_axis, best_bin, best_cost, scale


@numba.njit(cache=True, error_model="numpy")
def _partition(perm, start, end, centroid, axis, cmin, scale, split_bin):
    """Move the triangles binned below `split_bin` to the front (same arithmetic as the binning)."""
    n_bins = N_BINS
    i, j = start, end - 1
    while i <= j:
        if min(int((centroid[perm[i], axis] - cmin) * scale), n_bins - 1) < split_bin:
            i += 1
        else:
            perm[i], perm[j] = perm[j], perm[i]
            j -= 1
    return i


@numba.njit(cache=True, error_model="numpy")
def _median_split(perm, start, end, centroid, cbox):
    """Sort perm[start:end] by centroid along the longest centroid axis; split at half the count."""
    axis = 0
    for a in range(1, 3):
        if cbox[3 + a] - cbox[a] > cbox[3 + axis] - cbox[axis]:
            axis = a
    keys = np.empty(end - start)
    for i in range(start, end):
        keys[i - start] = centroid[perm[i], axis]
    order = np.argsort(keys, kind="mergesort")   # stable: equal keys keep their order (deterministic)
    sorted_perm = perm[start:end][order]
    perm[start:end] = sorted_perm
    return start + (end - start) // 2


@numba.njit(cache=True, error_model="numpy")
def _build(tri_lo, tri_hi, centroid, leaf_size, use_sah, nodes_f, nodes_i, perm):
    """Build into the preallocated node records; return the number of nodes written."""
    n_tris = perm.shape[0]
    capacity = 4 * MAX_SAH_DEPTH + 256
    task_start = np.empty(capacity, np.int64)
    task_end = np.empty(capacity, np.int64)
    task_parent = np.empty(capacity, np.int64)
    task_depth = np.empty(capacity, np.int64)
    bin_count = np.zeros((3, N_BINS), np.int64)
    bin_box = np.empty((3, N_BINS, 6))
    left_area = np.empty(N_BINS)
    left_count = np.empty(N_BINS, np.int64)
    box = np.empty(6)
    cbox = np.empty(6)
    task_start[0], task_end[0], task_parent[0], task_depth[0] = 0, n_tris, -1, 0
    top, next_node = 1, 0
    while top > 0:
        top -= 1
        start, end, parent, depth = task_start[top], task_end[top], task_parent[top], task_depth[top]
        node = next_node
        next_node += 1
        if parent >= 0:
            nodes_i[parent, 6] = node           # only right children are pushed with a parent
        _range_bounds(perm, start, end, tri_lo, tri_hi, centroid, box, cbox)
        for j in range(6):
            nodes_f[node, j] = box[j]
        count = end - start
        mid = -1
        if count > 1:
            if use_sah and depth < MAX_SAH_DEPTH:
                node_area = _half_area(box[0], box[1], box[2], box[3], box[4], box[5])
                axis, split_bin, cost, scale = _sah_split(
                    perm, start, end, tri_lo, tri_hi, centroid, cbox, node_area, leaf_size,
                    bin_count, bin_box, left_area, left_count)
                if axis >= 0 and (count > leaf_size or cost < C_INTERSECT * count):
                    mid = _partition(perm, start, end, centroid, axis, cbox[axis], scale[axis], split_bin)
                elif axis < 0 and count > leaf_size:   # every centroid in one point
                    mid = start + count // 2
            elif count > leaf_size:
                mid = _median_split(perm, start, end, centroid, cbox)
        if mid < 0:
            nodes_i[node, 6] = start
            nodes_i[node, 7] = count
            continue
        nodes_i[node, 7] = 0
        # Push right (patched into this node's link when popped), then left (popped next: node + 1).
        task_start[top], task_end[top], task_parent[top], task_depth[top] = mid, end, node, depth + 1
        top += 1
        task_start[top], task_end[top], task_parent[top], task_depth[top] = start, mid, -1, depth + 1
        top += 1
    return next_node


def build_bvh(vertices: np.ndarray, faces: np.ndarray, build: str = "sah", leaf_size: int = 4) -> Tree:
    """Build a BVH over the triangles `faces` (F, 3) int of `vertices` (V, 3) float; F >= 1."""
    vertices = np.asarray(vertices, dtype=np.float64)
    faces = np.asarray(faces, dtype=np.int64)
    corners = vertices[faces]                                   # (F, 3, 3)
    tri_lo = corners.min(axis=1).astype(np.float32)
    tri_hi = corners.max(axis=1).astype(np.float32)
    centroid = (0.5 * (tri_lo.astype(np.float64) + tri_hi)).astype(np.float32)   # box centre
    n_tris = len(faces)
    nodes_f, nodes_i = node_records(max(2 * n_tris - 1, 1))
    perm = np.arange(n_tris, dtype=np.int32)
    n_nodes = _build(tri_lo, tri_hi, centroid, int(leaf_size), build == "sah", nodes_f, nodes_i, perm)
    nodes_i = np.ascontiguousarray(nodes_i[:n_nodes])
    return Tree(BVH, nodes_i.view(np.float32), nodes_i, perm, leaf_triangles(vertices, faces, perm),
                scene_bounds(vertices))

"""Statistics of a built structure: size, depth, leaf sizes, SAH cost, overlap, memory.

SAH cost after MacDonald & Booth (1990), "Heuristics for ray tracing using space subdivision", The
Visual Computer 6(3), 153-166: the expected cost of a random ray that hits the root box is

    C = C_TRAVERSE * sum_inner A(n) / A(root) + C_INTERSECT * sum_leaf N(l) A(l) / A(root)

with A the surface area of a node's box (a kd-tree cell for the kd-tree) and N(l) the references in a
leaf; we use C_TRAVERSE = C_INTERSECT = 1 (one node visit costs one triangle test), the same constants
the builders use.
"""
import numba
import numpy as np

from tracer.accel.tree import BRUTE, BVH, Tree

C_TRAVERSE = 1.0
C_INTERSECT = 1.0
LEAF_HISTOGRAM_EDGES = (0, 1, 2, 3, 4, 5, 9, 17, 33, 65)   # bins [0], [1], ... [65, inf)


@numba.njit(cache=True, error_model="numpy")
def _bvh_walk(nodes_f, nodes_i, depth, overlap):
    """Depth of every node, and for inner nodes the area of the children's box intersection / own area."""
    n_nodes = nodes_i.shape[0]
    depth[0] = 0
    for n in range(n_nodes):
        overlap[n] = 0.0
        if nodes_i[n, 7] > 0:
            continue
        left, right = n + 1, nodes_i[n, 6]
        depth[left] = depth[n] + 1
        depth[right] = depth[n] + 1
        ex = min(nodes_f[left, 3], nodes_f[right, 3]) - max(nodes_f[left, 0], nodes_f[right, 0])
        ey = min(nodes_f[left, 4], nodes_f[right, 4]) - max(nodes_f[left, 1], nodes_f[right, 1])
        ez = min(nodes_f[left, 5], nodes_f[right, 5]) - max(nodes_f[left, 2], nodes_f[right, 2])
        own = _area(nodes_f, n)
        if own > 0.0 and ex >= 0.0 and ey >= 0.0 and ez >= 0.0:   # disjoint boxes overlap in nothing
            overlap[n] = 2.0 * (np.float64(ex) * ey + np.float64(ey) * ez + np.float64(ez) * ex) / own


@numba.njit(cache=True, error_model="numpy")
def _area(nodes_f, n):
    dx = nodes_f[n, 3] - nodes_f[n, 0]
    dy = nodes_f[n, 4] - nodes_f[n, 1]
    dz = nodes_f[n, 5] - nodes_f[n, 2]
    if dx < 0.0 or dy < 0.0 or dz < 0.0:
        return 0.0
    return 2.0 * (np.float64(dx) * dy + np.float64(dy) * dz + np.float64(dz) * dx)


def box_area(lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """Surface area of boxes (..., 3) lo and hi; 0 for empty boxes."""
    ext = np.maximum(np.asarray(hi, np.float64) - lo, 0.0)
    return 2.0 * (ext[..., 0] * ext[..., 1] + ext[..., 1] * ext[..., 2] + ext[..., 2] * ext[..., 0])


def leaf_histogram(leaf_sizes: np.ndarray) -> dict:
    """Counts of leaves by size, keyed "0", "1", ..., "5-8", ..., "65+"."""
    edges = list(LEAF_HISTOGRAM_EDGES) + [np.iinfo(np.int64).max]
    counts = np.histogram(leaf_sizes, bins=edges)[0]
    out = {}
    for lo, hi, c in zip(edges[:-1], edges[1:], counts, strict=True):
        label = str(lo) if hi == lo + 1 else (f"{lo}+" if hi == edges[-1] else f"{lo}-{hi - 1}")
        out[label] = int(c)
    return out


def summarise(leaf_sizes, leaf_depths, leaf_areas, inner_areas, root_area, n_nodes, n_triangles,
              n_references, memory_bytes) -> dict:
    """The statistics common to every structure (the `build` dict of the statistics JSON)."""
    leaf_sizes = np.asarray(leaf_sizes, np.int64)
    root_area = float(root_area)
    if root_area > 0.0:
        sah = (C_TRAVERSE * float(np.sum(inner_areas)) + C_INTERSECT * float(np.dot(leaf_sizes, leaf_areas)))
        sah /= root_area
    else:
        sah = float(C_INTERSECT * n_references)
    return {
        "nodes": int(n_nodes),
        "leaves": int(len(leaf_sizes)),
        "empty_leaves": int(np.count_nonzero(leaf_sizes == 0)),
        "depth_max": int(np.max(leaf_depths)) if len(leaf_depths) else 0,
        "depth_mean_leaf": float(np.mean(leaf_depths)) if len(leaf_depths) else 0.0,
        "leaf_size_max": int(leaf_sizes.max()) if len(leaf_sizes) else 0,
        "leaf_size_mean": float(leaf_sizes.mean()) if len(leaf_sizes) else 0.0,
        "leaf_size_histogram": leaf_histogram(leaf_sizes),
        "sah_cost": sah,
        "sah_constants": {"traverse": C_TRAVERSE, "intersect": C_INTERSECT},
        "references": int(n_references),
        "references_per_triangle": float(n_references) / max(n_triangles, 1),
        "memory_bytes": int(memory_bytes),
        "bytes_per_triangle": float(memory_bytes) / max(n_triangles, 1),
    }


def tree_memory(tree: Tree) -> int:
    return int(tree.nodes_i.nbytes + tree.refs.nbytes + tree.leaf_tris.nbytes)


def bvh_stats(tree: Tree, n_triangles: int) -> dict:
    nodes_f, nodes_i = tree.nodes_f, tree.nodes_i
    n_nodes = nodes_i.shape[0]
    depth = np.zeros(n_nodes, np.int64)
    overlap = np.zeros(n_nodes)
    _bvh_walk(nodes_f, nodes_i, depth, overlap)
    is_leaf = nodes_i[:, 7] > 0
    areas = box_area(nodes_f[:, 0:3], nodes_f[:, 3:6])
    out = summarise(nodes_i[is_leaf, 7], depth[is_leaf], areas[is_leaf], areas[~is_leaf], areas[0],
                    n_nodes, n_triangles, len(tree.refs), tree_memory(tree))
    out["sibling_overlap"] = float(overlap[~is_leaf].mean()) if np.any(~is_leaf) else 0.0
    return out


def brute_stats(tree: Tree, n_triangles: int) -> dict:
    out = summarise([n_triangles], [0], [1.0], [], 1.0, 0, n_triangles, len(tree.refs), tree_memory(tree))
    out["nodes"] = 0
    return out


def structure_stats(tree: Tree, n_triangles: int) -> dict:
    """The `build` statistics of any structure."""
    if tree.kind == BVH:
        return bvh_stats(tree, n_triangles)
    if tree.kind == BRUTE:
        return brute_stats(tree, n_triangles)
    from tracer.accel.kdtree import kdtree_stats
    return kdtree_stats(tree, n_triangles)

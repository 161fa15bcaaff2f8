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
def _bvh_walk(nodes_i, depth, overlap, lo, hi):
    """Depth of every 4-wide record (parents come first: depth-first order) and its sibling overlap.

    lo, hi (N, 4, 3): the lanes' boxes. overlap[r] = sum over pairs of used lanes of the area of their
    boxes' intersection, divided by the area of the record's own box (the union of its lanes).
    """
    depth[0] = 0
    for r in range(nodes_i.shape[0]):
        lx, ly, lz, hx, hy, hz = np.inf, np.inf, np.inf, -np.inf, -np.inf, -np.inf
        for k in range(4):
            if nodes_i[r, 28 + k] < 0:
                continue
            if nodes_i[r, 28 + k] == 0:
                depth[nodes_i[r, 24 + k]] = depth[r] + 1
            lx, ly, lz = min(lx, lo[r, k, 0]), min(ly, lo[r, k, 1]), min(lz, lo[r, k, 2])
            hx, hy, hz = max(hx, hi[r, k, 0]), max(hy, hi[r, k, 1]), max(hz, hi[r, k, 2])
        shared = 0.0
        for k in range(4):
            for m in range(k + 1, 4):
                if nodes_i[r, 28 + k] < 0 or nodes_i[r, 28 + m] < 0:
                    continue
                ex = min(hi[r, k, 0], hi[r, m, 0]) - max(lo[r, k, 0], lo[r, m, 0])
                ey = min(hi[r, k, 1], hi[r, m, 1]) - max(lo[r, k, 1], lo[r, m, 1])
                ez = min(hi[r, k, 2], hi[r, m, 2]) - max(lo[r, k, 2], lo[r, m, 2])
                if ex >= 0.0 and ey >= 0.0 and ez >= 0.0:   # disjoint boxes overlap in nothing
                    shared += 2.0 * (ex * ey + ey * ez + ez * ex)
        ex, ey, ez = hx - lx, hy - ly, hz - lz
        own = 2.0 * (ex * ey + ey * ez + ez * ex)
        overlap[r] = shared / own if own > 0.0 else 0.0


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
    """Statistics of the 4-wide BVH (layout in `tracer.accel.tree`).

    Nodes are the records (inner nodes) plus the leaves (lanes holding triangles); a leaf's depth is its
    record's depth + 1, the root record's depth being 0. The SAH cost sums the area of every record's
    own box (the union of its lanes) and N A over the leaves. Sibling overlap is the mean over records of
    the summed pairwise intersection areas of their children's boxes over the record's own area (for a
    binary node, the usual overlap of its two children). EPO: see `tracer.accel.epo`.
    """
    nodes_f, nodes_i = tree.nodes_f, tree.nodes_i
    n_records = nodes_i.shape[0]
    lo = np.stack([nodes_f[:, 0:4], nodes_f[:, 8:12], nodes_f[:, 16:20]], axis=-1).astype(np.float64)
    hi = np.stack([nodes_f[:, 4:8], nodes_f[:, 12:16], nodes_f[:, 20:24]], axis=-1).astype(np.float64)
    counts = nodes_i[:, 28:32]
    depth = np.zeros(n_records, np.int64)
    overlap = np.zeros(n_records)
    _bvh_walk(nodes_i, depth, overlap, lo, hi)
    used = counts >= 0
    own_lo = np.where(used[..., None], lo, np.inf).min(axis=1)
    own_hi = np.where(used[..., None], hi, -np.inf).max(axis=1)
    is_leaf = counts > 0
    leaf_sizes = counts[is_leaf]
    leaf_depths = np.broadcast_to(depth[:, None] + 1, counts.shape)[is_leaf]
    leaf_areas = box_area(lo[is_leaf], hi[is_leaf])
    inner_areas = box_area(own_lo, own_hi)
    out = summarise(leaf_sizes, leaf_depths, leaf_areas, inner_areas, inner_areas[0],
                    n_records + len(leaf_sizes), n_triangles, len(tree.refs), tree_memory(tree))
    out["sibling_overlap"] = float(overlap.mean()) if n_records else 0.0
    out["branching"] = float(np.count_nonzero(used)) / max(n_records, 1)
    from tracer.accel.epo import bvh_epo  # epo uses this module's cost constants
    out["epo"], out["epo_stderr"] = bvh_epo(tree)
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

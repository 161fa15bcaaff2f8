"""kd-tree: SAH build over sorted split events with perfect splits, spatial-median build, statistics.

SAH build: Wald & Havran (2006), "On building fast kd-Trees for Ray Tracing, and on doing that in
O(N log N)", Proceedings of the IEEE Symposium on Interactive Ray Tracing, 61-69,
DOI 10.1109/RT.2006.280216: the exact O(N log N) event-sorting algorithm (events sorted once per axis,
then kept sorted by linear splitting and merging), perfect splits (straddling triangles clipped to each
child cell, Sutherland-Hodgman), the empty-space bonus lambda = 0.8 and automatic termination (a cell
becomes a leaf when no split is cheaper than intersecting all its triangles). The kernels and their
details are in `tracer.accel._kdbuild`. Costs, in units of one ray/triangle test:

    K_T = COST_TRAVERSE = 2.0    visiting an inner node (a plane test, a stack step, a record load)
    K_I = COST_INTERSECT = 1.0   testing one triangle

Only the ratio K_T : K_I shapes the tree. Measured on the 1.3M-triangle displaced sphere (camera and
diffuse rays, one thread): traversal speed was flat within the noise from 1 : 1 to 3 : 1, while the
tree shrank (7.0M, 3.0M, 1.8M nodes; 3.8, 2.7, 2.3 references per triangle) and the build sped up with
it; 2 : 1 keeps the fewer triangle tests of the lower ratios. With the four-level records, on the 1M
demo (CPU time, camera and diffuse-bounce rays): 1 : 1, 1.5 : 1, 2.5 : 1 and 3 : 1 each traced 2-15%
slower than 2 : 1 (the lower ratios test fewer triangles, 1.8 and 2.3 per camera ray against 3.5, but
the tree grows to twice the records). `tracer.accel.stats` reports the SAH cost
of every structure with its own C_T = C_I = 1, so structures compare on one scale.

Median build (`build="median"`): the cell is cut at the middle of its longest axis, down to `leaf_size`
references or the depth limit; a cut after which one child still holds every reference while the other
gets copies of some separates nothing (a fan of triangles around a vertex never gets below its size),
and a cell whose cut would be the third such on its path becomes a leaf instead (the "bad refines"
rule of Pharr, Jakob & Humphreys, section 4.4, from memory).
The SAH build ignores `leaf_size`: its termination is the cost rule above.

Limits (both builds): depth at most 8 + 1.3 log2 N (the rule of thumb of Pharr, Jakob & Humphreys,
"Physically Based Rendering", 3rd ed., section 4.4; from memory) and never beyond
`MAX_TRAVERSAL_DEPTH` (64, what the traversal stack allows); references at most
`MAX_REFERENCES_PER_TRIANGLE` N (once spent, cells become leaves).

Node layout. The builder makes a binary tree; it is stored as treelets of up to four levels (15 kd
nodes) per 128-byte record (32 words, two cache lines), which the traversal decides in one 16-lane
vector step (`tracer.accel._kdtraverse`; the kd-tree counterpart of a wide BVH node). `Tree.nodes_i` /
`nodes_f` are (R, 32) int32 / float32 views of one block starting on a 64-byte boundary; record 0 holds
the root.

    treelet record (i[15] >= 0): positions p = 0..14 in heap order (p's below child is 2p + 1, its
        above child 2p + 2; "below" = coordinates <= split); slots s = 0..15 below the fourth level, slot
        s the end of the path whose choices are the bits of s, highest first (0 below, 1 above)
      f[p]       p = 0..14: split position of inner position p; NaN when p is not an inner node (a
                 leaf above it or at it)
      i[15]      2 bits per position, bits 2p..2p+1: its split axis (0 for a NaN position)
      i[16 + s]  slot s's link word; a leaf at position p above the fourth level covers the run of
                 slots below p, and the run's first slot holds it (the others: -1)
    leaf record (i[15] = -1): i[16] = first reference, i[17] = number of references, i[18] = 1 when a
        reference's triangle is referenced elsewhere too
    link word:  >= 0: record index; -1: an empty leaf (never visited); <= -2: a leaf of fewer than 8
                references kept in the link, -2 - (first << 4 | dup << 3 | count), so it costs no record
                (dup: as i[18] of a leaf record, the leaf's references go through the mailbox).

`binary_nodes` unpacks the records into the plain binary layout (depth-first, below child = node + 1;
inner: i[0] = axis, f[1] = split, i[2] = above child; leaf: i[0] = 3, i[2] = first reference, i[3] =
count), which the statistics and the tests read. Cell boxes are not stored: a cell is the root box
(`Tree.bounds`) cut by the splits on its path. A triangle straddling splits is referenced by every leaf
whose closed cell its clipped part touches.
"""
from concurrent.futures import ThreadPoolExecutor

import numba
import numpy as np

from tracer.accel._kdbuild import (
    END,
    LEAF,
    PLANAR,
    RECORD_WORDS,
    START,
    build_kdtree_kernel,
    cell_boxes,
    pack_records,
    stitch_subtrees,
    unpack_records,
)
from tracer.accel._kdtraverse import MAX_TRAVERSAL_DEPTH
from tracer.accel.stats import box_area, summarise, tree_memory
from tracer.accel.tree import KDTREE, Tree, node_records

COST_TRAVERSE = 2.0
COST_INTERSECT = 1.0
EMPTY_BONUS = 0.8                       # Wald & Havran 2006: lambda(p) when one side is empty
MAX_REFERENCES_PER_TRIANGLE = 16
MAX_TRIANGLES = 1 << 26                 # event keys hold 30 bits of triangle id, entry codes 28 of record
RECORD_ALIGN = 64                       # bytes: a 128-byte treelet record spans two whole cache lines
TOP_TASK_SHARE = 32                     # cells of at most N / 32 triangles are built in parallel ...
PARALLEL_MIN_TRIANGLES = 20000          # ... for meshes of at least this many triangles


def depth_limit(n_triangles: int) -> int:
    """Deepest leaf allowed for `n_triangles`: 8 + 1.3 log2 N, capped by the traversal stack."""
    return int(min(8 + 1.3 * np.log2(max(n_triangles, 1)), MAX_TRAVERSAL_DEPTH))


def _monotone(x: np.ndarray) -> np.ndarray:
    """float32 (K,) -> int64 (K,) that sorts like the floats (see `_kdbuild`); -0 counts as +0."""
    bits = (np.asarray(x, np.float32) + np.float32(0.0)).view(np.int32).astype(np.int64)
    return np.where(bits >= 0, bits, bits ^ 0x7FFFFFFF)


def _root_events(lo: np.ndarray, hi: np.ndarray, pool: ThreadPoolExecutor) -> tuple[np.ndarray, np.ndarray]:
    """Sorted event keys of all triangles per axis in a (3, capacity) arena, and their counts (3,)."""
    ids = np.arange(len(lo), dtype=np.int64) << 2

    def axis_events(a):
        flat = lo[:, a] == hi[:, a]
        starts = (_monotone(lo[:, a]) << 32) | ids | np.where(flat, PLANAR, START)
        ends = ((_monotone(hi[:, a]) << 32) | ids | END)[~flat]
        keys = np.concatenate([starts, ends])
        keys.sort()
        return keys

    per_axis = list(pool.map(axis_events, range(3)))
    counts = np.array([len(k) for k in per_axis], np.int64)
    arena = np.empty((3, int(2.5 * counts.max()) + 64), np.int64)
    for a in range(3):
        arena[a, :counts[a]] = per_axis[a]
    return arena, counts


def tree_from_binary(binary: np.ndarray, refs: np.ndarray, corners: np.ndarray, bounds: np.ndarray) -> Tree:
    """Pack a binary kd-tree ((M, 8) int32, the layout of `binary_nodes`) and its references (R,) into a
    Tree; corners (F, 3, 3) float32 are the triangles' vertices, copied per reference."""
    refs = np.ascontiguousarray(refs, np.int32)
    duplicated = np.bincount(refs)[refs] > 1 if len(refs) else np.zeros(0, np.bool_)
    packed = pack_records(np.ascontiguousarray(binary, np.int32), duplicated)
    records_f, records = node_records(len(packed), RECORD_WORDS, RECORD_ALIGN)
    records[:] = packed
    leaf_tris = np.ascontiguousarray(np.asarray(corners, np.float32).reshape(-1, 9)[refs])
    return Tree(KDTREE, records_f, records, refs, leaf_tris, np.asarray(bounds, np.float32))


def build_kdtree(vertices: np.ndarray, faces: np.ndarray, build: str = "sah", leaf_size: int = 4) -> Tree:
    """Build a kd-tree over `faces` (F, 3) int of `vertices` (V, 3) float; `build` is "sah" or "median"."""
    vertices = np.asarray(vertices, dtype=np.float64)
    faces = np.asarray(faces, dtype=np.int64).reshape(-1, 3)
    if build not in ("sah", "median"):
        raise ValueError(f"unknown kd-tree build {build!r}; choose 'sah' or 'median'")
    if vertices.ndim != 2 or vertices.shape[1] != 3:
        raise ValueError(f"vertices must be (V, 3), got {vertices.shape}")
    n_tris = len(faces)
    if n_tris >= MAX_TRIANGLES:
        raise ValueError(f"at most {MAX_TRIANGLES - 1} triangles, got {n_tris}")
    corners = vertices.astype(np.float32)[faces]                  # (F, 3, 3): what the traversal tests
    lo = corners.min(axis=1) if n_tris else np.zeros((0, 3), np.float32)
    hi = corners.max(axis=1) if n_tris else np.zeros((0, 3), np.float32)
    bounds = (np.concatenate([lo.min(axis=0), hi.max(axis=0)]) if n_tris
              else np.zeros(6, np.float32)).astype(np.float32)
    with ThreadPoolExecutor(max(1, numba.get_num_threads())) as pool:
        tri_xyz = np.ascontiguousarray(corners.reshape(-1, 9))
        binary, refs = _build_binary(tri_xyz, *_root_events(lo, hi, pool), bounds, build == "sah",
                                     int(leaf_size), pool)
    return tree_from_binary(binary, refs, corners, bounds)


def _build_binary(tri_xyz, arena, counts, bounds, use_sah, leaf_size, pool):
    """The binary tree and its references: the top cells in this thread, then the cells of at most
    N / TOP_TASK_SHARE triangles as independent builds on the pool's threads (the kernel releases the
    GIL), largest first, stitched together in depth-first order. Which cells are deferred depends only on
    N, so the tree is the same for any number of threads."""
    n_tris = len(tri_xyz)
    max_depth = depth_limit(n_tris)
    defer_below = n_tris // TOP_TASK_SHARE if n_tris >= PARALLEL_MIN_TRIANGLES else 0
    top, top_refs, events, start, count, box, depth, tris = build_kdtree_kernel(
        tri_xyz, arena, counts, bounds, n_tris, 0, use_sah, leaf_size, max_depth,
        MAX_REFERENCES_PER_TRIANGLE * max(n_tris, 1), COST_TRAVERSE, COST_INTERSECT, EMPTY_BONUS, defer_below)
    del arena                                       # the root's events: the largest buffer, no longer needed
    if len(tris) == 0:
        return top, top_refs
    deferred_events = [events]                      # dropped once every subtree has copied its part
    del events

    def subtree(k):
        sub_arena = np.empty((3, int(2.5 * count[k].max()) + 64), np.int64)
        for a in range(3):
            sub_arena[a, :count[k, a]] = deferred_events[0][a, start[k, a]:start[k, a] + count[k, a]]
        nodes, refs, *_ = build_kdtree_kernel(
            tri_xyz, sub_arena, count[k].copy(), box[k].copy(), tris[k], depth[k, 1], use_sah, leaf_size,
            max_depth - depth[k, 0], MAX_REFERENCES_PER_TRIANGLE * max(tris[k], 1), COST_TRAVERSE,
            COST_INTERSECT, EMPTY_BONUS, 0)
        return nodes, refs

    order = np.argsort(-tris, kind="stable")
    built = dict(zip(order.tolist(), pool.map(subtree, order.tolist()), strict=True))
    deferred_events.clear()
    subtrees = [built.pop(k) for k in range(len(tris))]
    node_base = np.concatenate([[0], np.cumsum([len(n) for n, _ in subtrees])]).astype(np.int64)
    ref_base = np.concatenate([[0], np.cumsum([len(r) for _, r in subtrees])]).astype(np.int64)
    return stitch_subtrees(top, top_refs, np.concatenate([n for n, _ in subtrees]), node_base,
                           np.concatenate([r for _, r in subtrees]), ref_base)


def binary_nodes(tree: Tree) -> tuple[np.ndarray, np.ndarray]:
    """The kd-tree as binary nodes: (M, 8) float32 and int32 views (layout in the module docstring)."""
    binary = np.zeros((31 * len(tree.nodes_i) + 1, 8), np.int32)
    m = unpack_records(tree.nodes_i, binary)
    binary = np.ascontiguousarray(binary[:m])
    return binary.view(np.float32), binary


def cells(tree: Tree) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Binary nodes (float32 and int32 views, see `binary_nodes`), their depth (M,) int64 and cell box
    (M, 6) float32 (lo, hi)."""
    nodes_f, nodes_i = binary_nodes(tree)
    depth = np.zeros(len(nodes_i), np.int64)
    boxes = np.zeros((len(nodes_i), 6), np.float32)
    cell_boxes(nodes_f, nodes_i, tree.bounds, depth, boxes)
    return nodes_f, nodes_i, depth, boxes


def kdtree_stats(tree: Tree, n_triangles: int) -> dict:
    """The common statistics (`stats.summarise` over the binary kd-tree: "nodes" are its inner nodes and
    leaves, empty ones included, cell areas give the SAH cost), plus the kd-tree's own: duplicated
    references, triangles referenced, records (stored 128-byte treelets and big leaves), build costs."""
    _, nodes_i, depth, boxes = cells(tree)
    is_leaf = nodes_i[:, 0] == LEAF
    areas = box_area(boxes[:, 0:3], boxes[:, 3:6])
    out = summarise(nodes_i[is_leaf, 3], depth[is_leaf], areas[is_leaf], areas[~is_leaf], areas[0],
                    len(nodes_i), n_triangles, len(tree.refs), tree_memory(tree))
    referenced = len(np.unique(tree.refs))
    out["duplicated_references"] = int(len(tree.refs) - referenced)
    out["triangles_referenced"] = int(referenced)
    out["records"] = int(len(tree.nodes_i))
    out["depth_limit"] = depth_limit(n_triangles)
    out["build_costs"] = {"traverse": COST_TRAVERSE, "intersect": COST_INTERSECT, "empty_bonus": EMPTY_BONUS}
    return out

"""Linear BVH: triangles sorted along a Morton curve, each node split at the highest differing bit.

Lauterbach, Garland, Sengupta, Luebke & Manocha (2009), "Fast BVH Construction on GPUs", Computer Graphics
Forum 28(2) (Eurographics 2009), 375-384, section 3 (the LBVH). Each triangle's centroid (the centre of
its box, as in the binned SAH build) is quantised to a grid over the centroid bounds and given the Morton
code of its cell (bits of x, y and z interleaved: Morton (1966), "A Computer Oriented Geodetic Data Base
and a New Technique in File Sequencing", IBM technical report); sorting by code lays the triangles along a
space-filling curve, and the triangles of a node [s, e) sharing the first b bits of their codes are split
where bit b + 1 changes (found by binary search: the codes are sorted), top-down as in Lauterbach et al.
Where every code of a node is the same the node is split in two halves by count; a node of at most
`leaf_size` triangles is a leaf. Node boxes come afterwards, bottom-up (a box is the union of its
children's boxes).

Where we depart from the paper, and why (each measured on the 1M- and 5M-triangle generated meshes):
- the code is not a fixed 30 bits: the cell index and the triangle index are packed into one 63-bit
  integer key (code << index bits | triangle), with as many bits per axis as fit beside the index
  (14 at 1M triangles, 13 at 5M, Lauterbach's 10 at 2^31). One `numpy.sort` of those keys (vectorised
  sorting networks on this CPU) took about 0.1 s at 5M, against 0.6 s for `numpy.argsort` of the codes and
  0.4-0.6 s for an 11-bit least-significant-digit radix sort written in numba;
- the grid is a cube (the longest extent of the centroid bounds on every axis), so a cell is a cube
  and a split at one bit halves a node along one axis by length, also in flat scenes (a terrain);
- the hierarchy is emitted top-down as in Lauterbach et al. rather than bottom-up by Karras (2012),
  "Maximizing Parallelism in the Construction of BVHs, Octrees, and k-d Trees", HPG 2012, 33-37: on
  two cores a serial top (down to subtrees of 1/`TOP_TASK_SHARE` of the triangles) followed by the
  subtrees in parallel keeps both cores busy, as the binned SAH build does (`tracer.accel.bvh`), and
  leaves of up to `leaf_size` triangles come out directly.

Not kept: refining the top with the SAH. Splitting every node that spans more than one cell of the first
4-7 bits per axis at the SAH-cheapest boundary along the curve (a full sweep over the cells' boxes, in
the spirit of the SAH-built top of HLBVH: Pantaleoni & Luebke (2010), "HLBVH: Hierarchical LBVH
Construction for Real-Time Ray Tracing of Dynamic Geometry", HPG 2010) left the SAH cost where it
was (31.8-32.1 on the 1M sphere, 21.2-21.4 on the 1M terrain, against 27.3 and 18.1 for the binned SAH
build) and raised the end-point overlap: the gap to the SAH build lies in the curve order itself, which
only a build that reorders triangles in 3D (or restructures treelets) would close.

The binary nodes use the format of `tracer.accel.bvh` (box at words 0:6, link or first reference at 6,
count at 7, the root at slot 2 F; a subtree over keys [s, e) writes its child pairs into [2 s, 2 e)),
so `bvh.finish_tree` collapses it into the same 4-wide records and every traversal kernel reads it
unchanged.
"""
import numba
import numpy as np

from tracer.accel._traverse import WORKERS, fetch_add
from tracer.accel.bvh import (
    EMPTY_HI,
    EMPTY_LO,
    finish_tree,
    pull_slice,
    triangle_records,
)
from tracer.accel.tree import Tree

KEY_BITS = 63           # a key is a non-negative int64: code << index bits | triangle index
MAX_AXIS_BITS = 21      # 3 x 21 = 63 bits of Morton code at most
TOP_TASK_SHARE = 64     # the serial top stops at subtrees of <= 1/64 of the triangles (as in bvh.py) ...
MIN_TOP_SPLIT = 4096    # ... or of this many, below which sharing does not pay
TOP_CAPACITY = 16384    # subtree tasks the top may hand out; a node is split at most 63 + 33 times
                        # (one code bit or one halving each), and each depth holds <= 64 nodes above
                        # the task size, so the top makes at most about 64 x 96 x 2 of them
BUILD_STACK = 256       # pending nodes of a depth-first build: at most the depth (<= 96) + 1


@numba.njit(cache=True, error_model="numpy", inline="always")
def _spread3(x):
    """The low 21 bits of x moved to bits 0, 3, 6, ... (the usual magic-mask bit spreading)."""
    x &= 0x1FFFFF
    x = (x | (x << 32)) & 0x1F00000000FFFF
    x = (x | (x << 16)) & 0x1F0000FF0000FF
    x = (x | (x << 8)) & 0x100F00F00F00F00F
    x = (x | (x << 4)) & 0x10C30C30C30C30C3
    x = (x | (x << 2)) & 0x1249249249249249
    return x


@numba.njit(cache=True, error_model="numpy")
def interleave3(x, y, z):
    """Morton code of the cell (x, y, z), 21 bits each: bit i of x, y, z goes to bit 3 i + 2, 3 i + 1, 3 i."""
    return (_spread3(np.int64(x)) << 2) | (_spread3(np.int64(y)) << 1) | _spread3(np.int64(z))


@numba.njit(cache=True, error_model="numpy", parallel=True)
def _morton_keys(prim_f, origin2, scale, axis_bits, index_bits, keys, n_workers):
    """keys[k] = Morton code of triangle k's cell << index_bits | k.

    The cell of a doubled centroid c2 = lo + hi (as `bvh._prepare` bounds them) on axis a is
    floor((c2 - origin2[a]) scale), clamped to the grid. Slices are pulled by whichever thread is free.
    """
    n = prim_f.shape[0]
    top = (np.int64(1) << axis_bits) - 1
    next_slice = np.zeros(1, np.int64)
    for _ in numba.prange(n_workers):
        while True:
            lo, hi = pull_slice(next_slice, n, n_workers)
            if lo >= hi:
                break
            for k in range(lo, hi):
                x = np.int64((np.float64(prim_f[k, 0] + prim_f[k, 4]) - origin2[0]) * scale)
                y = np.int64((np.float64(prim_f[k, 1] + prim_f[k, 5]) - origin2[1]) * scale)
                z = np.int64((np.float64(prim_f[k, 2] + prim_f[k, 6]) - origin2[2]) * scale)
                code = interleave3(min(max(x, 0), top), min(max(y, 0), top), min(max(z, 0), top))
                keys[k] = (code << index_bits) | k


@numba.njit(cache=True, error_model="numpy", inline="always")
def _highest_bit(x):
    """Index of the highest set bit of x > 0 (a binary search over the 63 bits)."""
    bit = 0
    for width in (32, 16, 8, 4, 2, 1):
        if x >> width:
            x >>= width
            bit += width
    return bit


@numba.njit(cache=True, error_model="numpy")
def _split_point(keys, start, end, index_bits):
    """Where to split the sorted keys [start, end): the first key whose code has the highest bit in which
    the node's first and last codes differ set (Lauterbach et al. 2009, section 3.1); the middle when
    all codes are equal."""
    differ = (keys[start] ^ keys[end - 1]) >> index_bits
    if differ == 0:
        return start + (end - start) // 2
    bit = _highest_bit(differ) + index_bits
    threshold = (keys[end - 1] >> bit) << bit     # the shared prefix, then a 1 at `bit`, then zeros
    lo, hi = start + 1, end - 1                   # the answer lies in (start, end - 1]
    while lo < hi:
        mid = (lo + hi) // 2
        if keys[mid] < threshold:
            lo = mid + 1
        else:
            hi = mid
    return lo


@numba.njit(cache=True, error_model="numpy")
def _build_range(keys, index_bits, prim_i, sorted_i, sorted_f, start, end, slot, first_pair, leaf_size,
                 task_size, node_f, node_i, tasks):
    """Emit the binary nodes over the sorted keys [start, end), the node itself at `slot`, depth first.

    Child pairs take slots from `first_pair` on. A node of at most `task_size` triangles is not built
    but appended to `tasks` (start, end, slot) (the serial top; 0 builds everything); a node of at most
    `leaf_size` becomes a leaf: its triangle records are copied into sorted order (sorted_i) and its box
    is theirs. Inner nodes get their boxes later (`_fill_boxes`). Returns (pairs end, tasks made).
    """
    mask = (np.int64(1) << index_bits) - 1
    stack = np.empty((BUILD_STACK, 3), np.int64)
    stack[0, 0], stack[0, 1], stack[0, 2] = start, end, slot
    top, next_pair, n_tasks = 1, first_pair, 0
    while top > 0:
        top -= 1
        s, e, node = stack[top, 0], stack[top, 1], stack[top, 2]
        count = e - s
        if count <= task_size or (task_size > 0 and n_tasks + top + 2 > tasks.shape[0]):
            tasks[n_tasks, 0], tasks[n_tasks, 1], tasks[n_tasks, 2] = s, e, node
            n_tasks += 1
            continue
        if count <= leaf_size:
            lo0, lo1, lo2, hi0, hi1, hi2 = EMPTY_LO, EMPTY_LO, EMPTY_LO, EMPTY_HI, EMPTY_HI, EMPTY_HI
            for k in range(s, e):
                triangle = keys[k] & mask
                for w in range(8):
                    sorted_i[k, w] = prim_i[triangle, w]
                lo0, lo1, lo2 = min(lo0, sorted_f[k, 0]), min(lo1, sorted_f[k, 1]), min(lo2, sorted_f[k, 2])
                hi0, hi1, hi2 = max(hi0, sorted_f[k, 4]), max(hi1, sorted_f[k, 5]), max(hi2, sorted_f[k, 6])
            node_f[node, 0], node_f[node, 1], node_f[node, 2] = lo0, lo1, lo2
            node_f[node, 3], node_f[node, 4], node_f[node, 5] = hi0, hi1, hi2
            node_i[node, 6], node_i[node, 7] = s, count
            continue
        mid = _split_point(keys, s, e, index_bits)
        node_i[node, 6], node_i[node, 7] = next_pair, 0
        stack[top, 0], stack[top, 1], stack[top, 2] = mid, e, next_pair + 1      # right below ...
        stack[top + 1, 0], stack[top + 1, 1], stack[top + 1, 2] = s, mid, next_pair   # ... left on top
        top += 2
        next_pair += 2
    return next_pair, n_tasks


@numba.njit(cache=True, error_model="numpy")
def _fill_boxes(node_f, node_i, first_pair, end_pair, root):
    """Boxes of the inner nodes in the pair slots [first_pair, end_pair) and of `root`, bottom-up.

    A pair is taken after its parent in a top-down build, so walking the slots backwards meets every
    node after its children (whose boxes are set: leaves when made, inner nodes earlier in this walk).
    """
    for k in range(end_pair - first_pair + 1):
        node = root if k == end_pair - first_pair else end_pair - 1 - k
        if node_i[node, 7] > 0:
            continue
        a, b = node_i[node, 6], node_i[node, 6] + 1
        for j in range(3):
            node_f[node, j] = min(node_f[a, j], node_f[b, j])
            node_f[node, 3 + j] = max(node_f[a, 3 + j], node_f[b, 3 + j])


@numba.njit(cache=True, error_model="numpy", parallel=True)
def _build_subtrees(keys, index_bits, prim_i, sorted_i, sorted_f, tasks, leaf_size, node_f, node_i, inner):
    """Build the subtrees of `tasks` (start, end, slot rows, largest first) on every thread.

    A subtree over keys [s, e) takes its child pairs from [2 s, 2 e), so threads never share memory;
    each thread takes the next unbuilt subtree when it is free (a shared counter). inner[k] = inner
    nodes of subtree k.
    """
    counter = np.zeros(1, np.int64)
    for _ in numba.prange(min(WORKERS, tasks.shape[0])):
        no_tasks = np.empty((1, 3), np.int64)
        while True:
            k = fetch_add(counter, 1)
            if k >= tasks.shape[0]:
                break
            s, e, slot = tasks[k, 0], tasks[k, 1], tasks[k, 2]
            end_pair, _tasks_made = _build_range(keys, index_bits, prim_i, sorted_i, sorted_f, s, e, slot,
                                                 2 * s, leaf_size, 0, node_f, node_i, no_tasks)
            _fill_boxes(node_f, node_i, 2 * s, end_pair, slot)
            inner[k] = (end_pair - 2 * s) // 2


def key_layout(n_triangles: int) -> tuple[int, int]:
    """(bits per axis of the Morton code, bits of the triangle index) packed into one 63-bit key."""
    index_bits = max(int(n_triangles - 1).bit_length(), 1)
    return min(MAX_AXIS_BITS, (KEY_BITS - index_bits) // 3), index_bits


def build_lbvh(vertices: np.ndarray, faces: np.ndarray, build: str = "lbvh", leaf_size: int = 4) -> Tree:
    """Build a linear BVH over the triangles `faces` (F, 3) int of `vertices` (V, 3) float; F >= 1."""
    vertices, faces, prim_f, prim_i, parts = triangle_records(vertices, faces)
    n_tris = len(faces)
    # The grid: a cube over the doubled centroids, its side the longest extent, 2^axis_bits cells a side.
    axis_bits, index_bits = key_layout(n_tris)
    origin2 = parts[:, 6:9].min(axis=0).astype(np.float64)
    extent = float((parts[:, 9:12].max(axis=0).astype(np.float64) - origin2).max())
    scale = (1 << axis_bits) * (1.0 - 1e-9) / extent if extent > 0.0 else 0.0
    keys = np.empty(n_tris, np.int64)
    _morton_keys(prim_f, origin2, scale, axis_bits, index_bits, keys, len(parts))
    keys.sort()
    root = 2 * n_tris
    node_i = np.empty((2 * n_tris + 1 + 2 * TOP_CAPACITY, 8), np.int32)
    node_f = node_i.view(np.float32)
    sorted_i = np.empty_like(prim_i)
    sorted_f = sorted_i.view(np.float32)
    tasks = np.empty((TOP_CAPACITY, 3), np.int64)
    task_size = max(n_tris // TOP_TASK_SHARE, MIN_TOP_SPLIT)
    top_end, n_tasks = _build_range(keys, index_bits, prim_i, sorted_i, sorted_f, 0, n_tris, root, root + 1,
                                    int(leaf_size), task_size, node_f, node_i, tasks)
    tasks = tasks[:n_tasks]
    tasks = np.ascontiguousarray(tasks[np.argsort(tasks[:, 0] - tasks[:, 1], kind="stable")])
    inner = np.zeros(n_tasks, np.int64)
    _build_subtrees(keys, index_bits, prim_i, sorted_i, sorted_f, tasks, int(leaf_size), node_f, node_i,
                    inner)
    _fill_boxes(node_f, node_i, root + 1, top_end, root)
    n_inner = (top_end - root - 1) // 2 + int(inner.sum())
    return finish_tree(node_f, node_i, root, n_inner, vertices, faces, sorted_i)

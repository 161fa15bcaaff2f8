"""Bounding volume hierarchy: binned SAH build and object-median build, collapsed to a 4-wide tree.

Binned SAH: Wald (2007), "On fast Construction of SAH-based Bounding Volume Hierarchies", IEEE
Symposium on Interactive Ray Tracing, 33-40. Triangle centroids are put into `N_BINS` equal bins over
the node's centroid bounds on each axis (eq. 2: k1 = K (1 - eps) / extent); the split plane between two
bins with the lowest surface area heuristic cost (Goldsmith & Salmon 1987; MacDonald & Booth 1990)

    C(split) = C_TRAVERSE + C_INTERSECT * (A(L) N(L) + A(R) N(R)) / A(P)

is taken, unless making the node a leaf (C_INTERSECT * N(P)) is no dearer and the node holds at most
`leaf_size` triangles. Nodes with more than `leaf_size` triangles are always split. C_TRAVERSE is the
measured cost of one 4-wide traversal step in triangle tests (about 2 here; the binary C reference,
shared/tools/rayref, uses 1); it only decides leaf or split for nodes of at most `leaf_size` triangles
(with 1 the 1M-triangle demo had leaves of 1.7 triangles on average and traced 8% slower).

Median: the node's triangles are split into two halves of equal count at the median centroid along the
longest axis of the centroid bounds, down to `leaf_size` (the classic object-median build).

Both builds first make a binary tree; it is then collapsed into a 4-wide tree (a BVH4: Dammertz,
Hanika & Keller (2008), "Shallow Bounding Volume Hierarchies for Fast SIMD Ray Tracing of Incoherent
Rays", Computer Graphics Forum 27(4), 1225-1233; Wald, Benthin & Boulos (2008), "Getting Rid of
Packets", IEEE Symposium on Interactive Ray Tracing, 1-8): each 4-wide node takes the two children of a
binary node and repeatedly opens the inner child of largest surface area until it has four, so a
traversal step loads one record and tests four boxes at once. The record layout is in
`tracer.accel.tree`.

How the build is made fast (each was measured on the 1M-triangle demo mesh):
- triangles are 32-byte records (box lo, box hi, id) that the partition moves, so every pass over a
  node reads contiguous memory instead of following a permutation;
- one binning pass per node serves all three axes, and the children's boxes come out of the bins: the
  only other pass is the partition, which also gathers the children's centroid bounds;
- only the non-empty bins are touched (a bit mask per axis), so a small node costs about its
  triangles, not 3 x `N_BINS` bins (clearing and sweeping every bin was most of the build time);
- the top of the tree is split serially until every pending node holds at most 1/`TOP_TASK_SHARE` of
  the triangles (about 15% of the work); those subtrees are then built in parallel, handed out largest
  first to whichever thread is free (`tracer.accel._traverse.fetch_add`). A subtree over triangles
  [s, e) writes its nodes into slots [2 s, 2 e), so the threads never share memory. Binning the top
  nodes in parallel instead saved little on a quiet machine and, with one parallel launch per node,
  was many times slower when other processes held a core.
"""
import numba
import numpy as np

from tracer.accel._traverse import WORKERS, fetch_add
from tracer.accel.tree import BVH, STACK_SIZE, Tree, node_records, scene_bounds

N_BINS = 32
BIN_SCALE = N_BINS * (1.0 - 1e-6)   # Wald 2007 eq. 2: the largest centroid falls into bin K - 1
C_TRAVERSE = 2.0        # cost of a 4-wide record step relative to one triangle test: measured about 2 in
C_INTERSECT = 1.0       # our kernels (rayref's binary tree uses 1:1); only the leaf-or-split choice uses it
MAX_SAH_DEPTH = 64      # below this depth the build falls back to median splits, bounding tree depth
WIDTH = 4               # children per node of the collapsed tree
RECORD_WORDS = 32       # 4 x 6 box planes + 4 child links + 4 counts, 128 bytes
RECORD_ALIGN = 128      # bytes: a record fills two whole cache lines (one adjacent-line pair)
TOP_TASK_SHARE = 64     # the serial top phase stops at subtrees of <= 1/64 of the triangles (enough
MIN_TOP_SPLIT = 4096    # tasks to share evenly) or of this many, below which sharing does not pay
SLICES_PER_THREAD = 16  # a pass over all triangles is cut into this many slices per thread, pulled
                        # by whichever thread is free
BUILD_STACK = 256       # pending nodes of one subtree build (depth-first: at most its depth + 1)
F32 = np.float32
EMPTY_LO, EMPTY_HI = F32(np.inf), F32(-np.inf)   # an unused lane's box: no ray enters it


@numba.njit(cache=True, error_model="numpy", inline="always")
def _half_area(lo0, lo1, lo2, hi0, hi1, hi2):
    dx, dy, dz = hi0 - lo0, hi1 - lo1, hi2 - lo2
    if dx < 0.0:
        return 0.0
    return np.float64(dx * dy + dy * dz + dz * dx)


@numba.njit(cache=True, error_model="numpy", inline="always")
def _bin_of(c2, cmin2, scale):
    """Bin of a doubled centroid c2 = lo + hi (the partition must use this same arithmetic)."""
    return min(int((c2 - cmin2) * scale), N_BINS - 1)


@numba.njit(cache=True, error_model="numpy")
def _range_bounds(prim_f, start, end, out):
    """out[0:6] = box of the records [start, end), out[6:12] = box of their doubled centroids."""
    for a in range(3):
        out[a] = EMPTY_LO
        out[3 + a] = EMPTY_HI
        out[6 + a] = EMPTY_LO
        out[9 + a] = EMPTY_HI
    for i in range(start, end):
        for a in range(3):
            lo, hi = prim_f[i, a], prim_f[i, 4 + a]
            c2 = lo + hi
            out[a] = min(out[a], lo)
            out[3 + a] = max(out[3 + a], hi)
            out[6 + a] = min(out[6 + a], c2)
            out[9 + a] = max(out[9 + a], c2)


@numba.njit(cache=True, error_model="numpy", inline="always")
def _bin_add(bins_f, bins_n, a, b, used, lo0, lo1, lo2, hi0, hi1, hi2):
    """Grow bin b of axis a by one triangle box; `used` has bit b set once the bin holds something."""
    bit = np.int64(1) << b
    if used & bit:
        bins_n[a, b] += 1
        bins_f[a, b, 0] = min(bins_f[a, b, 0], lo0)
        bins_f[a, b, 1] = min(bins_f[a, b, 1], lo1)
        bins_f[a, b, 2] = min(bins_f[a, b, 2], lo2)
        bins_f[a, b, 4] = max(bins_f[a, b, 4], hi0)
        bins_f[a, b, 5] = max(bins_f[a, b, 5], hi1)
        bins_f[a, b, 6] = max(bins_f[a, b, 6], hi2)
        return used
    bins_n[a, b] = 1
    bins_f[a, b, 0], bins_f[a, b, 1], bins_f[a, b, 2] = lo0, lo1, lo2
    bins_f[a, b, 4], bins_f[a, b, 5], bins_f[a, b, 6] = hi0, hi1, hi2
    return used | bit


@numba.njit(cache=True, error_model="numpy")
def _bin_range(prim_f, start, end, cmin2, scale, bins_f, bins_n, used):
    """Count the records [start, end) into the bins of all three axes and grow the bins' boxes.

    bins_f (3, N_BINS, 8): lo at 0:3, hi at 4:7; bins_n (3, N_BINS). used[a] gets a bit per non-empty
    bin of axis a; only those bins are written or read, so a small node costs little more than its
    triangles (clearing and sweeping all 3 x N_BINS bins per node was most of the build time). An axis
    with scale 0 (flat centroid bounds) puts everything in bin 0; the sweep skips it.
    """
    u0, u1, u2 = np.int64(0), np.int64(0), np.int64(0)
    m0, m1, m2 = cmin2[0], cmin2[1], cmin2[2]
    s0, s1, s2 = scale[0], scale[1], scale[2]
    for i in range(start, end):
        lo0, lo1, lo2 = prim_f[i, 0], prim_f[i, 1], prim_f[i, 2]
        hi0, hi1, hi2 = prim_f[i, 4], prim_f[i, 5], prim_f[i, 6]
        u0 = _bin_add(bins_f, bins_n, 0, _bin_of(lo0 + hi0, m0, s0), u0, lo0, lo1, lo2, hi0, hi1, hi2)
        u1 = _bin_add(bins_f, bins_n, 1, _bin_of(lo1 + hi1, m1, s1), u1, lo0, lo1, lo2, hi0, hi1, hi2)
        u2 = _bin_add(bins_f, bins_n, 2, _bin_of(lo2 + hi2, m2, s2), u2, lo0, lo1, lo2, hi0, hi1, hi2)
    used[0], used[1], used[2] = u0, u1, u2


@numba.njit(cache=True, error_model="numpy")
def _bin_scales(box12, cmin2, scale):
    """Bin origin and scale per axis from the centroid bounds box12[6:12]; scale 0 for a flat axis."""
    for a in range(3):
        cmin2[a] = box12[6 + a]
        extent = box12[9 + a] - box12[6 + a]
        scale[a] = F32(BIN_SCALE / np.float64(extent)) if extent > 0.0 else F32(0.0)


@numba.njit(cache=True, error_model="numpy")
def _best_split(bins_f, bins_n, used, scale, left_area, left_count, order):
    """Sweep the non-empty bins of each axis: (axis, first bin of the right side, A(L) N(L) + A(R) N(R)).

    Planes between two neighbouring non-empty bins split the triangles alike, so sweeping only the
    non-empty bins finds the same best plane as sweeping all of them (ties: the same order). axis is -1
    when no plane has triangles on both sides.
    """
    best_axis, best_bin, best_cost = -1, 0, np.inf
    for a in range(3):
        if scale[a] == 0.0:
            continue
        n_used = 0
        for b in range(N_BINS):
            if used[a] & (np.int64(1) << b):
                order[n_used] = b
                n_used += 1
        lo0, lo1, lo2, hi0, hi1, hi2 = EMPTY_LO, EMPTY_LO, EMPTY_LO, EMPTY_HI, EMPTY_HI, EMPTY_HI
        count = 0
        for k in range(n_used - 1):     # left of the plane after the k-th non-empty bin
            b = order[k]
            lo0 = min(lo0, bins_f[a, b, 0])
            lo1 = min(lo1, bins_f[a, b, 1])
            lo2 = min(lo2, bins_f[a, b, 2])
            hi0 = max(hi0, bins_f[a, b, 4])
            hi1 = max(hi1, bins_f[a, b, 5])
            hi2 = max(hi2, bins_f[a, b, 6])
            count += bins_n[a, b]
            left_area[k] = _half_area(lo0, lo1, lo2, hi0, hi1, hi2)
            left_count[k] = count
        lo0, lo1, lo2, hi0, hi1, hi2 = EMPTY_LO, EMPTY_LO, EMPTY_LO, EMPTY_HI, EMPTY_HI, EMPTY_HI
        count = 0
        for k in range(n_used - 1, 0, -1):   # right of the plane before the k-th non-empty bin
            b = order[k]
            lo0 = min(lo0, bins_f[a, b, 0])
            lo1 = min(lo1, bins_f[a, b, 1])
            lo2 = min(lo2, bins_f[a, b, 2])
            hi0 = max(hi0, bins_f[a, b, 4])
            hi1 = max(hi1, bins_f[a, b, 5])
            hi2 = max(hi2, bins_f[a, b, 6])
            count += bins_n[a, b]
            cost = left_area[k - 1] * left_count[k - 1] + _half_area(lo0, lo1, lo2, hi0, hi1, hi2) * count
            if cost < best_cost:
                best_axis, best_bin, best_cost = a, b, cost
    return best_axis, best_bin, best_cost


@numba.njit(cache=True, error_model="numpy")
def _bins_box(bins_f, used, axis, first, last, out12):
    """out12[0:6] = union of the boxes of the non-empty bins [first, last) on `axis`."""
    for j in range(3):
        out12[j] = EMPTY_LO
        out12[3 + j] = EMPTY_HI
    for b in range(first, last):
        if not used[axis] & (np.int64(1) << b):
            continue
        for j in range(3):
            out12[j] = min(out12[j], bins_f[axis, b, j])
            out12[3 + j] = max(out12[3 + j], bins_f[axis, b, 4 + j])


@numba.njit(cache=True, error_model="numpy", inline="always")
def _swap(prim_i, i, j):
    for w in range(8):
        prim_i[i, w], prim_i[j, w] = prim_i[j, w], prim_i[i, w]


@numba.njit(cache=True, error_model="numpy", inline="always")
def _grow_centroids(prim_f, i, out12):
    for a in range(3):
        c2 = prim_f[i, a] + prim_f[i, 4 + a]
        out12[6 + a] = min(out12[6 + a], c2)
        out12[9 + a] = max(out12[9 + a], c2)


@numba.njit(cache=True, error_model="numpy")
def _partition(prim_f, prim_i, start, end, axis, cmin2, scale, split_bin, left12, right12):
    """Move the records binned below `split_bin` to the front (Hoare's scheme); return the first of the rest.

    Gathers each side's centroid bounds into left12/right12[6:12] on the way.
    """
    for a in range(3):
        left12[6 + a] = EMPTY_LO
        left12[9 + a] = EMPTY_HI
        right12[6 + a] = EMPTY_LO
        right12[9 + a] = EMPTY_HI
    i, j = start, end - 1
    while True:
        while i <= j and _bin_of(prim_f[i, axis] + prim_f[i, 4 + axis], cmin2, scale) < split_bin:
            _grow_centroids(prim_f, i, left12)
            i += 1
        while i <= j and _bin_of(prim_f[j, axis] + prim_f[j, 4 + axis], cmin2, scale) >= split_bin:
            _grow_centroids(prim_f, j, right12)
            j -= 1
        if i > j:
            return i
        _swap(prim_i, i, j)
        _grow_centroids(prim_f, i, left12)
        _grow_centroids(prim_f, j, right12)
        i += 1
        j -= 1


@numba.njit(cache=True, error_model="numpy", inline="always")
def _centroid_key(prim_f, i, axis):
    return prim_f[i, axis] + prim_f[i, 4 + axis]


@numba.njit(cache=True, error_model="numpy")
def _median_partition(prim_f, prim_i, start, end, box12):
    """Put the lower half by centroid, along the longest centroid axis, first; return the middle.

    Quickselect with Hoare's partition and a median-of-three pivot (Hoare (1961), "Algorithm 65:
    Find", Communications of the ACM 4(7), 321-322): afterwards no record before the middle has a
    larger centroid than any record from the middle on.
    """
    axis = 0
    for a in range(1, 3):
        if box12[9 + a] - box12[6 + a] > box12[9 + axis] - box12[6 + axis]:
            axis = a
    middle = start + (end - start) // 2
    lo, hi = start, end - 1
    while lo < hi:
        ka, kb, kc = _centroid_key(prim_f, lo, axis), _centroid_key(prim_f, (lo + hi) // 2, axis), \
            _centroid_key(prim_f, hi, axis)
        pivot = max(min(ka, kb), min(max(ka, kb), kc))
        i, j = lo, hi
        while i <= j:
            while _centroid_key(prim_f, i, axis) < pivot:
                i += 1
            while _centroid_key(prim_f, j, axis) > pivot:
                j -= 1
            if i <= j:
                _swap(prim_i, i, j)
                i += 1
                j -= 1
        if middle <= j:
            hi = j
        elif middle >= i:
            lo = i
        else:
            break
    return middle


@numba.njit(cache=True, error_model="numpy")
def _split(prim_f, prim_i, start, end, depth, box12, leaf_size, use_sah, bins_f, bins_n, used, cmin2, scale,
           left_area, left_count, order, left12, right12):
    """Decide how to split the node [start, end) with box/centroid box `box12`; -1 makes it a leaf.

    bins_f ... order are scratch for the SAH. Writes the children's boxes and centroid boxes into left12
    and right12.
    """
    count = end - start
    if count <= 1:
        return -1
    if use_sah and depth < MAX_SAH_DEPTH:
        _bin_scales(box12, cmin2, scale)
        _bin_range(prim_f, start, end, cmin2, scale, bins_f, bins_n, used)
        axis, split_bin, raw = _best_split(bins_f, bins_n, used, scale, left_area, left_count, order)
        node_area = _half_area(box12[0], box12[1], box12[2], box12[3], box12[4], box12[5])
        cost = C_TRAVERSE + C_INTERSECT * raw / node_area if node_area > 0.0 else np.inf
        if axis >= 0 and (count > leaf_size or cost < C_INTERSECT * count):
            mid = _partition(prim_f, prim_i, start, end, axis, cmin2[axis], scale[axis], split_bin,
                             left12, right12)
            _bins_box(bins_f, used, axis, 0, split_bin, left12)
            _bins_box(bins_f, used, axis, split_bin, N_BINS, right12)
            return mid
        if axis >= 0 or count <= leaf_size:
            return -1
        mid = start + count // 2               # every centroid in one point: split the list
    elif count > leaf_size:
        mid = _median_partition(prim_f, prim_i, start, end, box12)
    else:
        return -1
    _range_bounds(prim_f, start, mid, left12)
    _range_bounds(prim_f, mid, end, right12)
    return mid


@numba.njit(cache=True, error_model="numpy", inline="always")
def _write_node(node_f, node_i, slot, box12, link, count):
    for j in range(6):
        node_f[slot, j] = box12[j]
    node_i[slot, 6] = link
    node_i[slot, 7] = count


@numba.njit(cache=True, error_model="numpy")
def _build_subtree(prim_f, prim_i, start, end, slot, depth, box12, leaf_size, use_sah, node_f, node_i):
    """Build the binary subtree over records [start, end) with its root at `slot`; serial.

    Inner nodes get their children as a pair of slots taken from [2 start, 2 end) (a subtree of n
    triangles has at most n - 1 inner nodes). Returns the number of inner nodes made.
    """
    bins_f = np.empty((3, N_BINS, 8), np.float32)
    bins_n = np.empty((3, N_BINS), np.int64)
    used = np.zeros(3, np.int64)
    order = np.empty(N_BINS, np.int64)
    left_area = np.empty(N_BINS)
    left_count = np.empty(N_BINS, np.int64)
    cmin2 = np.empty(3, np.float32)
    scale = np.empty(3, np.float32)
    task = np.empty((BUILD_STACK, 4), np.int64)          # start, end, slot, depth
    task_box = np.empty((BUILD_STACK, 12), np.float32)
    task[0, 0], task[0, 1], task[0, 2], task[0, 3] = start, end, slot, depth
    for w in range(12):
        task_box[0, w] = box12[w]
    top, next_pair, inner = 1, 2 * start, 0
    while top > 0:
        top -= 1
        s, e, node, d = task[top, 0], task[top, 1], task[top, 2], task[top, 3]
        box = task_box[top]
        left12 = task_box[top + 1]      # children's boxes land where they will be pushed
        right12 = task_box[top + 2]
        mid = _split(prim_f, prim_i, s, e, d, box, leaf_size, use_sah, bins_f, bins_n, used, cmin2, scale,
                     left_area, left_count, order, left12, right12)
        if mid < 0:
            _write_node(node_f, node_i, node, box, s, e - s)
            continue
        _write_node(node_f, node_i, node, box, next_pair, 0)
        inner += 1
        # Right child below, left on top (popped next): the pushes reuse the rows just filled.
        for w in range(12):
            task_box[top, w] = right12[w]
        task[top, 0], task[top, 1], task[top, 2], task[top, 3] = mid, e, next_pair + 1, d + 1
        task[top + 1, 0], task[top + 1, 1], task[top + 1, 2], task[top + 1, 3] = s, mid, next_pair, d + 1
        top += 2
        next_pair += 2
    return inner


@numba.njit(cache=True, error_model="numpy", parallel=True)
def _build_subtrees(prim_f, prim_i, tasks, task_box, leaf_size, use_sah, node_f, node_i, inner):
    """Build the subtrees of `tasks` (start, end, slot, depth rows, largest first) on every thread.

    Each thread takes the next unbuilt subtree when it is free (a shared counter), so threads finish
    together even though subtree sizes differ.
    """
    counter = np.zeros(1, np.int64)
    for _ in numba.prange(min(WORKERS, tasks.shape[0])):
        while True:
            k = fetch_add(counter, 1)
            if k >= tasks.shape[0]:
                break
            inner[k] = _build_subtree(prim_f, prim_i, tasks[k, 0], tasks[k, 1], tasks[k, 2], tasks[k, 3],
                                      task_box[k], leaf_size, use_sah, node_f, node_i)


@numba.njit(cache=True, error_model="numpy")
def _build_top(prim_f, prim_i, root12, leaf_size, use_sah, node_f, node_i):
    """Split the top of the tree (serially, breadth first) down to subtrees small enough to hand out.

    The root goes to slot 2 F and top-level pairs after it. Returns (subtree tasks (K, 4), their boxes
    (K, 12), inner nodes made).
    """
    n = prim_f.shape[0]
    limit = max(n // TOP_TASK_SHARE, MIN_TOP_SPLIT)
    capacity = 4 * TOP_TASK_SHARE * 4 + 16
    queue = np.empty((capacity, 4), np.int64)
    queue_box = np.empty((capacity, 12), np.float32)
    out = np.empty((capacity, 4), np.int64)
    out_box = np.empty((capacity, 12), np.float32)
    bins_f = np.empty((3, N_BINS, 8), np.float32)
    bins_n = np.empty((3, N_BINS), np.int64)
    used = np.zeros(3, np.int64)
    order = np.empty(N_BINS, np.int64)
    left_area = np.empty(N_BINS)
    left_count = np.empty(N_BINS, np.int64)
    cmin2 = np.empty(3, np.float32)
    scale = np.empty(3, np.float32)
    left12 = np.empty(12, np.float32)
    right12 = np.empty(12, np.float32)
    queue[0, 0], queue[0, 1], queue[0, 2], queue[0, 3] = 0, n, 2 * n, 0
    for w in range(12):
        queue_box[0, w] = root12[w]
    head, tail, n_out, next_pair, inner = 0, 1, 0, 2 * n + 1, 0
    while head < tail:
        s, e, node, d = queue[head, 0], queue[head, 1], queue[head, 2], queue[head, 3]
        box = queue_box[head]
        head += 1
        if e - s <= limit or tail + 2 > capacity:
            for w in range(4):
                out[n_out, w] = queue[head - 1, w]
            for w in range(12):
                out_box[n_out, w] = box[w]
            n_out += 1
            continue
        mid = _split(prim_f, prim_i, s, e, d, box, leaf_size, use_sah, bins_f, bins_n, used, cmin2, scale,
                     left_area, left_count, order, left12, right12)
        if mid < 0:
            _write_node(node_f, node_i, node, box, s, e - s)
            continue
        _write_node(node_f, node_i, node, box, next_pair, 0)
        inner += 1
        queue[tail, 0], queue[tail, 1], queue[tail, 2], queue[tail, 3] = s, mid, next_pair, d + 1
        for w in range(12):
            queue_box[tail, w] = left12[w]
        queue[tail + 1, 0], queue[tail + 1, 1] = mid, e
        queue[tail + 1, 2], queue[tail + 1, 3] = next_pair + 1, d + 1
        for w in range(12):
            queue_box[tail + 1, w] = right12[w]
        tail += 2
        next_pair += 2
    # Largest subtree first (insertion sort, stable), so the last ones handed out are small.
    order = np.arange(n_out)
    for a in range(1, n_out):
        k = order[a]
        b = a - 1
        while b >= 0 and out[order[b], 1] - out[order[b], 0] < out[k, 1] - out[k, 0]:
            order[b + 1] = order[b]
            b -= 1
        order[b + 1] = k
    tasks = np.empty((n_out, 4), np.int64)
    task_box = np.empty((n_out, 12), np.float32)
    for a in range(n_out):
        for w in range(4):
            tasks[a, w] = out[order[a], w]
        for w in range(12):
            task_box[a, w] = out_box[order[a], w]
    return tasks, task_box, inner


@numba.njit(cache=True, error_model="numpy", inline="always")
def _binary_area(node_f, b):
    return _half_area(node_f[b, 0], node_f[b, 1], node_f[b, 2], node_f[b, 3], node_f[b, 4], node_f[b, 5])


@numba.njit(cache=True, error_model="numpy")
def _collapse(node_f, node_i, root, width, out_f, out_i):
    """Write the binary tree at `root` as `width`-wide records, depth-first; return (records, stack need).

    A record's lanes start as the two children of a binary inner node; the inner lane of largest surface
    area is replaced by its two children until `width` lanes are filled or only leaves remain. The stack
    need is the most traversal-stack entries a ray can hold: every lane of each record on its path.
    """
    stack = np.empty((STACK_SIZE * WIDTH, 3), np.int64)     # binary node, parent record, parent lane
    pending = np.empty(out_f.shape[0], np.int64)
    lanes = np.empty(WIDTH, np.int64)
    stack[0, 0], stack[0, 1], stack[0, 2] = root, -1, 0
    top, n_out, most = 1, 0, 0
    while top > 0:
        top -= 1
        b, parent, parent_lane = stack[top, 0], stack[top, 1], stack[top, 2]
        r = n_out
        n_out += 1
        if parent >= 0:
            out_i[parent, 24 + parent_lane] = r
        if node_i[b, 7] > 0:            # the whole tree is one leaf: one lane
            lanes[0] = b
            n_lanes = 1
        else:
            lanes[0], lanes[1] = node_i[b, 6], node_i[b, 6] + 1
            n_lanes = 2
            while n_lanes < width:
                pick, pick_area = -1, -1.0
                for k in range(n_lanes):
                    if node_i[lanes[k], 7] == 0:
                        area = _binary_area(node_f, lanes[k])
                        if area > pick_area:
                            pick, pick_area = k, area
                if pick < 0:
                    break
                first = node_i[lanes[pick], 6]
                for k in range(n_lanes, pick + 1, -1):     # keep the lanes in left-to-right order
                    lanes[k] = lanes[k - 1]
                lanes[pick], lanes[pick + 1] = first, first + 1
                n_lanes += 1
        before = pending[parent] if parent >= 0 else 0      # entries left by the records above
        most = max(most, before + n_lanes)
        pending[r] = before + n_lanes - 1
        for k in range(WIDTH):
            if k < n_lanes:
                c = lanes[k]
                for a in range(3):
                    out_f[r, 8 * a + k] = node_f[c, a]
                    out_f[r, 8 * a + 4 + k] = node_f[c, 3 + a]
                if node_i[c, 7] > 0:
                    out_i[r, 24 + k] = node_i[c, 6]
                    out_i[r, 28 + k] = node_i[c, 7]
                else:
                    out_i[r, 28 + k] = 0
            else:
                for a in range(3):
                    out_f[r, 8 * a + k] = EMPTY_LO
                    out_f[r, 8 * a + 4 + k] = EMPTY_HI
                out_i[r, 24 + k] = 0
                out_i[r, 28 + k] = -1
        for k in range(n_lanes - 1, -1, -1):           # lane 0's subtree comes right after the record
            c = lanes[k]
            if node_i[c, 7] == 0:
                stack[top, 0], stack[top, 1], stack[top, 2] = c, r, k
                top += 1
    return n_out, most


@numba.njit(cache=True, error_model="numpy", inline="always")
def pull_slice(next_slice, n, n_workers):
    """The next slice [lo, hi) of range(n) for the calling thread: range(n) cut into n_workers x
    SLICES_PER_THREAD slices, handed out in order through the shared counter next_slice[0] (`fetch_add`),
    so whichever thread is free takes the next one; lo == hi once none is left."""
    n_slices = n_workers * SLICES_PER_THREAD
    step = (n + n_slices - 1) // n_slices
    s = fetch_add(next_slice, 1)
    return min(s * step, n), min((s + 1) * step, n)


@numba.njit(cache=True, error_model="numpy", parallel=True)
def _prepare(vertices, faces, prim_f, prim_i, parts):
    """Triangle records (box lo at 0:3, hi at 4:7, id at 7); parts[p] = bounds of the slices thread p made.

    Slices are pulled by whichever thread is free, so a thread that the system holds back does not hold
    up the others.
    """
    n = faces.shape[0]
    next_slice = np.zeros(1, np.int64)
    for p in numba.prange(parts.shape[0]):
        box = np.empty(12, np.float32)
        for a in range(3):
            parts[p, a], parts[p, 3 + a], parts[p, 6 + a], parts[p, 9 + a] = \
                EMPTY_LO, EMPTY_HI, EMPTY_LO, EMPTY_HI
        while True:
            lo, hi = pull_slice(next_slice, n, parts.shape[0])
            if lo >= hi:
                break
            for k in range(lo, hi):
                for a in range(3):
                    x0 = vertices[faces[k, 0], a]
                    x1 = vertices[faces[k, 1], a]
                    x2 = vertices[faces[k, 2], a]
                    prim_f[k, a] = min(x0, x1, x2)
                    prim_f[k, 4 + a] = max(x0, x1, x2)
                prim_f[k, 3] = F32(0.0)
                prim_i[k, 7] = k
            _range_bounds(prim_f, lo, hi, box)
            for a in range(3):
                parts[p, a] = min(parts[p, a], box[a])
                parts[p, 3 + a] = max(parts[p, 3 + a], box[3 + a])
                parts[p, 6 + a] = min(parts[p, 6 + a], box[6 + a])
                parts[p, 9 + a] = max(parts[p, 9 + a], box[9 + a])


@numba.njit(cache=True, error_model="numpy", parallel=True)
def _gather_triangles(vertices, faces, prim_i, refs, leaf_tris, n_workers):
    """refs[k] = triangle id of record k; leaf_tris[k] = its vertices v0, v1, v2 (float32).

    Slices are pulled by whichever thread is free (as in `_prepare`).
    """
    n = prim_i.shape[0]
    next_slice = np.zeros(1, np.int64)
    for _ in numba.prange(n_workers):
        while True:
            lo, hi = pull_slice(next_slice, n, n_workers)
            if lo >= hi:
                break
            for k in range(lo, hi):
                tri = prim_i[k, 7]
                refs[k] = tri
                for c in range(3):
                    for a in range(3):
                        leaf_tris[k, 3 * c + a] = vertices[faces[tri, c], a]


def triangle_records(vertices: np.ndarray, faces: np.ndarray):
    """The input every BVH build starts from: (vertices float32, faces int32, prim_f, prim_i, parts) with
    prim_f / prim_i the (F, 8) float32 / int32 views of the 32-byte triangle records and parts the
    per-thread bounds of `_prepare` (box in [0:6], box of the doubled centroids in [6:12])."""
    vertices = np.ascontiguousarray(vertices, dtype=np.float32)
    faces = np.ascontiguousarray(faces, dtype=np.int32)
    prim_i = np.empty((len(faces), 8), np.int32)
    prim_f = prim_i.view(np.float32)
    parts = np.empty((numba.get_num_threads(), 12), np.float32)
    _prepare(vertices, faces, prim_f, prim_i, parts)
    return vertices, faces, prim_f, prim_i, parts


def finish_tree(node_f, node_i, root: int, n_inner: int, vertices, faces, prim_i) -> Tree:
    """The `Tree` of a binary BVH (root at slot `root`, `n_inner` inner nodes, leaves over the triangle
    records `prim_i` in order): collapsed to 4-wide records, leaf triangles gathered."""
    wide_i = np.empty((max(n_inner, 1), RECORD_WORDS), np.int32)
    n_records, need = _collapse(node_f, node_i, root, WIDTH, wide_i.view(np.float32), wide_i)
    if need > STACK_SIZE:       # a pathological tree: two lanes per record need at most its depth
        n_records, need = _collapse(node_f, node_i, root, 2, wide_i.view(np.float32), wide_i)
        if need > STACK_SIZE:
            raise RuntimeError(f"BVH deeper than the traversal stack ({need} > {STACK_SIZE} entries)")
    out_f, out_i = node_records(n_records, RECORD_WORDS, RECORD_ALIGN)
    out_i[:] = wide_i[:n_records]
    n_tris = len(faces)
    refs = np.empty(n_tris, np.int32)
    leaf_tris = np.empty((n_tris, 9), np.float32)
    _gather_triangles(vertices, faces, prim_i, refs, leaf_tris, numba.get_num_threads())
    return Tree(BVH, out_f, out_i, refs, leaf_tris, scene_bounds(vertices))


def build_bvh(vertices: np.ndarray, faces: np.ndarray, build: str = "sah", leaf_size: int = 4) -> Tree:
    """Build a BVH over the triangles `faces` (F, 3) int of `vertices` (V, 3) float; F >= 1."""
    vertices, faces, prim_f, prim_i, parts = triangle_records(vertices, faces)
    n_tris = len(faces)
    root12 = np.concatenate([parts[:, [0, 1, 2]].min(axis=0), parts[:, [3, 4, 5]].max(axis=0),
                             parts[:, [6, 7, 8]].min(axis=0), parts[:, [9, 10, 11]].max(axis=0)])
    root12 = root12.astype(np.float32)
    node_i = np.empty((2 * n_tris + 8 * TOP_TASK_SHARE * 4 + 40, 8), np.int32)
    node_f = node_i.view(np.float32)
    use_sah = build == "sah"
    tasks, task_box, inner_top = _build_top(prim_f, prim_i, root12, int(leaf_size), use_sah, node_f, node_i)
    inner = np.zeros(len(tasks), np.int64)
    _build_subtrees(prim_f, prim_i, tasks, task_box, int(leaf_size), use_sah, node_f, node_i, inner)
    return finish_tree(node_f, node_i, 2 * n_tris, int(inner_top + inner.sum()), vertices, faces, prim_i)

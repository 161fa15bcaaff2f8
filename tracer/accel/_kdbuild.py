"""kd-tree construction kernels: SAH split search over sorted events, perfect splits, spatial median;
packing of the binary tree into treelet records.

Wald & Havran (2006), "On building fast kd-Trees for Ray Tracing, and on doing that in O(N log N)",
Proceedings of the IEEE Symposium on Interactive Ray Tracing, 61-69, DOI 10.1109/RT.2006.280216.
(Section names below are theirs; numbers are left out, we quote them from memory only.)

Events: every triangle in a cell gives, per axis, a start and an end event at the bounds of its part
inside the cell, or one planar event when it is flat along that axis. Each axis keeps its events sorted
by position; a key packs (position, triangle, type) into one int64, so integer order is event order:

    key = monotone(float32 bits of the position) << 32 | triangle << 2 | type      (END 0, PLANAR 1, START 2)

`monotone` maps the float32 bit pattern to an integer that sorts like the float (sign-magnitude to two's
complement, -0 folded into +0 beforehand), so positions are compared exactly, as integers.

Split search (their incremental "sweep"): one pass over a cell's sorted events per axis counts, at
every candidate plane p, the triangles wholly below (N_L), lying in p (N_P) and wholly above (N_R), and
evaluates their SAH cost with the empty-space bias (MacDonald & Booth 1990; Wald & Havran 2006):

    C(p) = lambda(p) * (K_T + K_I * (P_L * N_L + P_R * N_R)),   P = area(child cell) / area(cell)
    lambda(p) = empty_bonus (0.8) when one side holds no triangle, else 1,

once with the planar triangles below and once above; the cheaper side keeps them. Only planes strictly
inside the cell are candidates (a plane on the cell boundary would make a child as large as the cell).
The cell becomes a leaf when the best C(p) is not below K_I * N, the cost of intersecting every
triangle (their automatic termination criterion).

Splitting: triangles are classified from the split axis's events alone; the events of triangles on one
side keep their sorted order and are copied into that child's lists; the few triangles that straddle
the plane are clipped (their "perfect splits") and their clipped bounds make new events, which are
sorted and merged in. Every step is linear in the cell's events and the sort only touches the
straddlers: O(N log N) overall. Clipping: Sutherland & Hodgman (1974), "Reentrant polygon clipping",
Communications of the ACM 17(1), 32-42, of the triangle against the six faces of the cell, then one cut
by the split plane gives both children's polygons. It runs in float64 on the float32 vertices that the
traversal tests; the bounds are rounded outward to float32 and kept inside the child cell, so a
triangle is referenced in every leaf whose closed cell it touches.

Median split: the middle of the cell along its longest axis; triangles lying in the plane go below.

Memory: each axis's events live in one int64 array used as a stack (a cell's lists sit on top while it is
processed, its children's lists replace them), so the working set is the events of the cells on the
current path and their pending siblings.

Parallel build: the kernel can stop at cells of at most `defer_below` triangles and hand back their
event lists; the caller builds those cells with further calls on other threads (the kernel releases the
GIL) and `stitch_subtrees` joins the pieces into one depth-first tree. Branch-free inner loops where the
data decide (event types, sides): those branches are unpredictable.
"""
import numba
import numpy as np
from llvmlite import ir
from numba.core import types
from numba.extending import intrinsic

F32 = np.float32
END, PLANAR, START = 0, 1, 2
BOTH, BELOW, ABOVE = 0, 1, 2            # side of a triangle relative to the split plane
LEAF = 3                                # node word i[0] of a leaf (0..2 = split axis of an inner node)
DEFERRED = 4                            # node word i[0] of a cell left for a separate build
MAX_BAD_SPLITS = 3                      # median build: the third cut on a path that separates nothing
                                        # is refused (the cell becomes a leaf)
LOW32 = 0xFFFFFFFF


@numba.njit(cache=True, error_model="numpy", inline="always")
def _monotone(bits):
    """float32 bit pattern (int) <-> integer with the float's order (the map is its own inverse)."""
    b = np.int64(bits)
    return b if b >= 0 else b ^ 0x7FFFFFFF


@intrinsic
def _float_bits(typingctx, x):
    """The int32 bit pattern of a float32 (a register move, no memory round trip)."""
    if x != types.float32:
        return None

    def codegen(context, builder, signature, args):
        return builder.bitcast(args[0], ir.IntType(32))
    return types.int32(types.float32), codegen


@intrinsic
def _bits_float(typingctx, bits):
    """The float32 of an int32 bit pattern."""
    if bits != types.int32:
        return None

    def codegen(context, builder, signature, args):
        return builder.bitcast(args[0], ir.FloatType())
    return types.float32(types.int32), codegen


@numba.njit(cache=True, error_model="numpy", inline="always")
def _plane_of(x):
    return _monotone(_float_bits(x + F32(0.0)))      # -0 + 0 = +0: one integer per position


@numba.njit(cache=True, error_model="numpy", inline="always")
def _position_of(plane):
    return _bits_float(np.int32(_monotone(plane)))


@numba.njit(cache=True, error_model="numpy", inline="always")
def _outward_bounds(poly, m, cell_lo, cell_hi, out):
    """Bounds (6,) of poly[:m] rounded outward to float32 and kept inside the cell [cell_lo, cell_hi]."""
    for a in range(3):
        lo, hi = poly[0, a], poly[0, a]
        for i in range(1, m):
            lo = min(lo, poly[i, a])
            hi = max(hi, poly[i, a])
        lo32, hi32 = F32(lo), F32(hi)
        if np.float64(lo32) > lo:
            lo32 = np.nextafter(lo32, F32(-np.inf))
        if np.float64(hi32) < hi:
            hi32 = np.nextafter(hi32, F32(np.inf))
        out[a] = min(max(lo32, cell_lo[a]), cell_hi[a])
        out[3 + a] = max(min(hi32, cell_hi[a]), cell_lo[a])


@numba.njit(cache=True, error_model="numpy")
def _split_clipped_bounds(tri_xyz, tri, box, axis, split, polys, below_lo, below_hi, above_lo, above_hi,
                          out_below, out_above):
    """Bounds (6,) float32 of triangle `tri` clipped to each child of the cell `box` (lo, hi) split at
    `split` on `axis` (Sutherland-Hodgman): clipped to the cell once, then cut by the split plane.

    Rounded outward to float32 and kept inside the child cell. If rounding leaves nothing on one side
    (the triangle only touches it), its own bounds cut to that child cell are used: a superset.
    polys (3, 12, 3) float64 scratch; below_lo ... above_hi (3,) the children's corners.
    """
    m = 3
    for v in range(3):
        for j in range(3):
            polys[0, v, j] = np.float64(tri_xyz[tri, 3 * v + j])
    src, dst = 0, 1
    for plane in range(6):
        a = plane % 3
        c = np.float64(box[plane])
        sign = 1.0 if plane < 3 else -1.0       # keep x >= lo, then x <= hi
        cuts = False
        for i in range(m):
            if sign * (polys[src, i, a] - c) < 0.0:
                cuts = True
                break
        if not cuts:                            # the usual case: this face does not cut the polygon
            continue
        n_out = 0
        for i in range(m):
            j = i + 1 if i + 1 < m else 0
            dc = sign * (polys[src, i, a] - c)
            dn = sign * (polys[src, j, a] - c)
            if dc >= 0.0:
                for q in range(3):
                    polys[dst, n_out, q] = polys[src, i, q]
                n_out += 1
            if (dc >= 0.0) != (dn >= 0.0):      # the edge crosses the plane: add the crossing point
                t = dc / (dc - dn)
                for q in range(3):
                    polys[dst, n_out, q] = polys[src, i, q] + t * (polys[src, j, q] - polys[src, i, q])
                polys[dst, n_out, a] = c
                n_out += 1
        m = n_out
        src, dst = dst, src
        if m == 0:
            break
    # Cut by the split plane: polygon `src` -> below part in `dst`, above part in the third buffer.
    third = 3 - src - dst
    c = np.float64(split)
    n_below, n_above = 0, 0
    for i in range(m):
        j = i + 1 if i + 1 < m else 0
        dc = polys[src, i, axis] - c
        dn = polys[src, j, axis] - c
        if dc <= 0.0:
            for q in range(3):
                polys[dst, n_below, q] = polys[src, i, q]
            n_below += 1
        if dc >= 0.0:
            for q in range(3):
                polys[third, n_above, q] = polys[src, i, q]
            n_above += 1
        if (dc < 0.0 and dn > 0.0) or (dc > 0.0 and dn < 0.0):
            t = dc / (dc - dn)
            for q in range(3):
                x = polys[src, i, q] + t * (polys[src, j, q] - polys[src, i, q])
                polys[dst, n_below, q] = x
                polys[third, n_above, q] = x
            polys[dst, n_below, axis] = c
            polys[third, n_above, axis] = c
            n_below += 1
            n_above += 1
    for part in range(2):
        poly, n = (dst, n_below) if part == 0 else (third, n_above)
        if n == 0:                              # rounding left nothing: the triangle itself
            n = 3
            for v in range(3):
                for j in range(3):
                    polys[poly, v, j] = np.float64(tri_xyz[tri, 3 * v + j])
        if part == 0:
            _outward_bounds(polys[poly], n, below_lo, below_hi, out_below)
        else:
            _outward_bounds(polys[poly], n, above_lo, above_hi, out_above)


@numba.njit(cache=True, error_model="numpy")
def _sort_keys(keys, count):
    """Sort keys[:count] in place: insertion sort for the usual handful of straddler events."""
    if count > 24:
        keys[:count].sort()
        return
    for i in range(1, count):
        key = keys[i]
        j = i - 1
        while j >= 0 and keys[j] > key:
            keys[j + 1] = keys[j]
            j -= 1
        keys[j + 1] = key


@numba.njit(cache=True, error_model="numpy")
def _grow_rows(array, rows_needed):
    """A copy of 2-D `array` with at least `rows_needed` rows (doubling), or `array` if it is big enough."""
    if rows_needed <= array.shape[0]:
        return array
    bigger = np.zeros((max(rows_needed, 2 * array.shape[0]), array.shape[1]), array.dtype)
    bigger[:array.shape[0]] = array
    return bigger


@numba.njit(cache=True, error_model="numpy")
def _grow_columns(array, columns_needed):
    if columns_needed <= array.shape[1]:
        return array
    bigger = np.empty((array.shape[0], max(columns_needed, 2 * array.shape[1])), array.dtype)
    bigger[:, :array.shape[1]] = array
    return bigger


@numba.njit(cache=True, error_model="numpy")
def _sweep_axis(events, begin, end, n, box, a, dx, dy, dz, cost_traverse, cost_intersect, empty_bonus,
                ):
    """Cheapest split plane among the sorted events[begin:end] of axis `a`: (cost, plane, planar side).

    Wald & Havran 2006, the sweep: at each plane p, N_P triangles lie in p, N_L end at or before it,
    N_R start at or after it; the cost C(p) = lambda(p) (K_T + K_I (P_L N_L + P_R N_R)) is taken with the
    planar ones on either side. The counting is branch-free: event types come in no predictable order.
    """
    lo_plane = _plane_of(box[a])
    hi_plane = _plane_of(box[3 + a])
    width = np.float64(box[3 + a]) - box[a]
    e1 = dy if a == 0 else dx                     # the cell's two other extents
    e2 = dz if a != 2 else dy
    cross, rim = e1 * e2, e1 + e2
    scale = cost_intersect / (dx * dy + dy * dz + dz * dx)   # K_I / (half the cell's area)
    best_cost, best_plane, best_side = np.inf, np.int64(0), BELOW
    n_below, n_above = 0, n
    i = begin
    while i < end:
        key = events[i]
        plane = key >> 32
        n_end, n_planar, n_start = 0, 0, 0
        while True:
            kind = key & 3
            n_end += kind == END
            n_planar += kind == PLANAR
            n_start += kind == START
            i += 1
            if i >= end:
                break
            key = events[i]
            if key >> 32 != plane:
                break
        n_above -= n_planar + n_end
        if lo_plane < plane < hi_plane:
            offset = np.float64(_position_of(plane)) - box[a]
            area_below = (offset * rim + cross) * scale          # K_I P_L
            area_above = ((width - offset) * rim + cross) * scale  # K_I P_R
            # Planar triangles below ...
            nl, nr = n_below + n_planar, n_above
            cost = cost_traverse + area_below * nl + area_above * nr
            if nl == 0 or nr == 0:
                cost *= empty_bonus
            if cost < best_cost:
                best_cost, best_plane, best_side = cost, plane, BELOW
            if n_planar > 0:
                # ... or above.
                nl, nr = n_below, n_above + n_planar
                cost = cost_traverse + area_below * nl + area_above * nr
                if nl == 0 or nr == 0:
                    cost *= empty_bonus
                if cost < best_cost:
                    best_cost, best_plane, best_side = cost, plane, ABOVE
        n_below += n_start + n_planar
    return best_cost, best_plane, best_side


@numba.njit(cache=True, error_model="numpy", nogil=True)
def build_kdtree_kernel(tri_xyz, arena, n_events, root_box, n_root, root_bad, use_sah, leaf_size, max_depth,
                        max_refs, cost_traverse, cost_intersect, empty_bonus, defer_below):
    """Build the tree over the `n_root` triangles whose sorted events of axis a are arena[a, :n_events[a]]
    (arena (3, cap) int64), in the cell root_box (6,) float32; tri_xyz (F, 9) float32 vertices.

    Returns the binary nodes (N, 8) int32 (layout: `tracer.accel.kdtree.binary_nodes`), the references
    (R,) int32, and the deferred cells: with defer_below > 0 every cell below the root holding at most
    defer_below triangles is left for a separate call (built in parallel): its node gets i[0] = DEFERRED,
    i[2] = its index k, and its events are returned in deferred_events[a, start[k, a]:][:count[k, a]],
    with its box (K, 6), depth and count of bad median cuts on its path (K, 2), triangle count (K,);
    root_bad starts that count for the root (the median build's rule, below).
    """
    n_tris = tri_xyz.shape[0]
    deferred_events = np.empty((3, 0), np.int64)
    deferred_start = np.zeros((16, 3), np.int64)
    deferred_count = np.zeros((16, 3), np.int64)
    deferred_box = np.zeros((16, 6), np.float32)
    deferred_depth = np.zeros((16, 2), np.int64)
    deferred_tris = np.zeros((16, 1), np.int64)
    n_deferred, deferred_used = 0, 0
    polys = np.empty((3, 12, 3))
    clipped_below = np.empty(6, np.float32)
    clipped_above = np.empty(6, np.float32)
    below_lo = np.empty(3, np.float32)
    below_hi = np.empty(3, np.float32)
    above_lo = np.empty(3, np.float32)
    above_hi = np.empty(3, np.float32)
    side = np.zeros(n_tris, np.int8)                    # BOTH between uses
    straddlers = np.empty(n_tris, np.int32)
    new_below = np.empty((3, 64), np.int64)
    new_above = np.empty((3, 64), np.int64)
    n_new_below = np.zeros(3, np.int64)
    n_new_above = np.zeros(3, np.int64)
    scratch_end = np.zeros(3, np.int64)
    n_only_below = np.zeros(3, np.int64)
    n_only_above = np.zeros(3, np.int64)

    nodes = np.zeros((2 * n_root + 16, 8), np.int32)     # grown on demand
    refs = np.empty((2 * n_root + 16, 1), np.int32)
    n_nodes, n_refs = 0, 0

    stack_cap = max_depth + 4
    task_start = np.zeros((stack_cap, 3), np.int64)
    task_count = np.zeros((stack_cap, 3), np.int64)
    task_box = np.zeros((stack_cap, 6), np.float32)
    task_depth = np.zeros(stack_cap, np.int64)
    task_parent = np.zeros(stack_cap, np.int64)
    task_above = np.zeros(stack_cap, np.bool_)
    task_bad = np.zeros(stack_cap, np.int64)
    task_tris = np.zeros(stack_cap, np.int64)
    for a in range(3):
        task_count[0, a] = n_events[a]
    task_box[0] = root_box
    task_parent[0] = -1
    task_bad[0] = root_bad
    task_tris[0] = n_root
    top = 1
    live_refs = n_root                                   # references in leaves + in pending cells

    start = np.zeros(3, np.int64)
    count = np.zeros(3, np.int64)
    box = np.zeros(6, np.float32)
    while top > 0:
        top -= 1
        for a in range(3):
            start[a] = task_start[top, a]
            count[a] = task_count[top, a]
        for j in range(6):
            box[j] = task_box[top, j]
        depth, parent, n, is_above = task_depth[top], task_parent[top], task_tris[top], task_above[top]
        bad = task_bad[top]
        nodes = _grow_rows(nodes, n_nodes + 1)
        node = n_nodes
        n_nodes += 1
        if is_above:
            nodes[parent, 2] = node                      # the below child is parent + 1
        if parent >= 0 and n <= defer_below and defer_below > 0:
            nodes[node, 0] = DEFERRED
            nodes[node, 2] = n_deferred
            deferred_start = _grow_rows(deferred_start, n_deferred + 1)
            deferred_count = _grow_rows(deferred_count, n_deferred + 1)
            deferred_box = _grow_rows(deferred_box, n_deferred + 1)
            deferred_depth = _grow_rows(deferred_depth, n_deferred + 1)
            deferred_tris = _grow_rows(deferred_tris, n_deferred + 1)
            deferred_events = _grow_columns(deferred_events, deferred_used + count.max())
            for a in range(3):
                deferred_start[n_deferred, a] = deferred_used
                deferred_count[n_deferred, a] = count[a]
                for i in range(count[a]):
                    deferred_events[a, deferred_used + i] = arena[a, start[a] + i]
            deferred_used += count.max()
            deferred_box[n_deferred] = box
            deferred_depth[n_deferred, 0] = depth
            deferred_depth[n_deferred, 1] = bad
            deferred_tris[n_deferred, 0] = n
            n_deferred += 1
            continue

        # Choose the split: axis, plane (monotone integer) and the side of triangles lying in it.
        axis, split_plane, planar_side = -1, np.int64(0), BELOW
        if n > 0 and depth < max_depth and live_refs <= max_refs:
            if use_sah:
                dx = np.float64(box[3]) - box[0]
                dy = np.float64(box[4]) - box[1]
                dz = np.float64(box[5]) - box[2]
                half_area = dx * dy + dy * dz + dz * dx
                best_cost = cost_intersect * n           # the leaf's cost: split only if cheaper
                if half_area > 0.0:
                    for a in range(3):
                        if box[3 + a] > box[a]:
                            cost, plane, planar = _sweep_axis(
                                arena[a], start[a], start[a] + count[a], n, box, a, dx, dy, dz,
                                cost_traverse, cost_intersect, empty_bonus)
                            if cost < best_cost:
                                best_cost, axis, split_plane, planar_side = cost, a, plane, planar
            elif n > leaf_size:
                a = 0
                for b in range(1, 3):
                    if box[3 + b] - box[b] > box[3 + a] - box[a]:
                        a = b
                middle = F32(0.5 * (np.float64(box[a]) + np.float64(box[3 + a])))
                if box[a] < middle < box[3 + a]:
                    axis, split_plane = a, _plane_of(middle)

        # Classify from the split axis's events alone (Wald & Havran 2006, classification).
        n_straddle, n_below_only, n_above_only, bad_split = 0, 0, 0, False
        if axis >= 0:
            for i in range(start[axis], start[axis] + count[axis]):
                key = arena[axis, i]
                plane = key >> 32
                kind = key & 3
                tri = (key & LOW32) >> 2
                if kind == END and plane <= split_plane:
                    side[tri] = BELOW
                    n_below_only += 1
                elif kind == START and plane >= split_plane:
                    side[tri] = ABOVE
                    n_above_only += 1
                elif kind == PLANAR:
                    if plane < split_plane or (plane == split_plane and planar_side == BELOW):
                        side[tri] = BELOW
                        n_below_only += 1
                    else:
                        side[tri] = ABOVE
                        n_above_only += 1
            n_straddle = n - n_below_only - n_above_only
            # Median: a "bad" cut keeps every reference in one child and copies some into the other;
            # after MAX_BAD_SPLITS of them on a path the cell is a leaf (pbrt's rule, from memory).
            bad_split = not use_sah and n_straddle > 0 and (n_below_only == 0 or n_above_only == 0)
            if bad_split and bad + 1 >= MAX_BAD_SPLITS:
                axis = -1
            elif live_refs + n_straddle > max_refs:
                axis = -1                                # reference budget spent
            if axis < 0:
                for i in range(start[0], start[0] + count[0]):
                    side[(arena[0, i] & LOW32) >> 2] = BOTH

        if axis < 0:
            # Leaf: each triangle has exactly one START or PLANAR event on axis 0.
            refs = _grow_rows(refs, n_refs + n)
            nodes[node, 0] = LEAF
            nodes[node, 2] = n_refs
            nodes[node, 3] = n
            for i in range(start[0], start[0] + count[0]):
                key = arena[0, i]
                if key & 3 != END:
                    refs[n_refs, 0] = (key & LOW32) >> 2
                    n_refs += 1
            continue

        split = _position_of(split_plane)
        nodes[node, 0] = axis
        nodes[node, 1] = _float_bits(split)
        live_refs += n_straddle

        # Clip the straddling triangles to both children ("perfect splits") into sorted new events.
        k = 0
        for i in range(start[axis], start[axis] + count[axis]):
            key = arena[axis, i]
            tri = (key & LOW32) >> 2
            if key & 3 == START and side[tri] == BOTH:
                straddlers[k] = tri
                k += 1
        new_below = _grow_columns(new_below, 2 * n_straddle)
        new_above = _grow_columns(new_above, 2 * n_straddle)
        for a in range(3):
            n_new_below[a] = 0
            n_new_above[a] = 0
        for a in range(3):
            below_lo[a], below_hi[a] = box[a], box[3 + a]
            above_lo[a], above_hi[a] = box[a], box[3 + a]
        below_hi[axis] = split
        above_lo[axis] = split
        for s in range(n_straddle):
            tri = straddlers[s]
            _split_clipped_bounds(tri_xyz, tri, box, axis, split, polys, below_lo, below_hi, above_lo,
                                  above_hi, clipped_below, clipped_above)
            for a in range(3):
                tri_bits = np.int64(tri) << 2
                lo, hi = clipped_below[a], clipped_below[3 + a]
                if lo == hi:
                    new_below[a, n_new_below[a]] = (_plane_of(lo) << 32) | tri_bits | PLANAR
                    n_new_below[a] += 1
                else:
                    new_below[a, n_new_below[a]] = (_plane_of(lo) << 32) | tri_bits | START
                    new_below[a, n_new_below[a] + 1] = (_plane_of(hi) << 32) | tri_bits | END
                    n_new_below[a] += 2
                lo, hi = clipped_above[a], clipped_above[3 + a]
                if lo == hi:
                    new_above[a, n_new_above[a]] = (_plane_of(lo) << 32) | tri_bits | PLANAR
                    n_new_above[a] += 1
                else:
                    new_above[a, n_new_above[a]] = (_plane_of(lo) << 32) | tri_bits | START
                    new_above[a, n_new_above[a] + 1] = (_plane_of(hi) << 32) | tri_bits | END
                    n_new_above[a] += 2
        for a in range(3):
            _sort_keys(new_below[a], n_new_below[a])
            _sort_keys(new_above[a], n_new_above[a])

        # Children's lists replace the cell's: [above | below] from start[a]; one-sided events are first
        # copied above both (below-only upward, above-only downward, in one region of count[a] slots).
        needed = 0
        for a in range(3):
            scratch_end[a] = start[a] + 2 * count[a] + n_new_below[a] + n_new_above[a]
            needed = max(needed, scratch_end[a])
        arena = _grow_columns(arena, needed)
        for a in range(3):
            base = scratch_end[a] - count[a]
            lo_i, hi_i = base, scratch_end[a] - 1
            for i in range(start[a], start[a] + count[a]):
                key = arena[a, i]
                s = side[(key & LOW32) >> 2]
                # Branch-free: write both slots, advance the one that keeps the key (never cross:
                # one-sided events number at most count[a], so lo_i <= hi_i before each write).
                arena[a, lo_i] = key
                arena[a, hi_i] = key
                lo_i += s == BELOW
                hi_i -= s == ABOVE
            n_only_below[a] = lo_i - base
            n_only_above[a] = scratch_end[a] - 1 - hi_i
        for a in range(3):
            base = scratch_end[a] - count[a]
            out = start[a]
            # Merge the above-only events (stored backwards from the region's end) with the new ones.
            i, i_stop = scratch_end[a] - 1, scratch_end[a] - 1 - n_only_above[a]
            j, j_stop = 0, n_new_above[a]
            while i > i_stop or j < j_stop:
                if j >= j_stop or (i > i_stop and arena[a, i] <= new_above[a, j]):
                    arena[a, out] = arena[a, i]
                    i -= 1
                else:
                    arena[a, out] = new_above[a, j]
                    j += 1
                out += 1
            above_count = out - start[a]
            i, i_stop = base, base + n_only_below[a]
            j, j_stop = 0, n_new_below[a]
            while i < i_stop or j < j_stop:
                if j >= j_stop or (i < i_stop and arena[a, i] <= new_below[a, j]):
                    arena[a, out] = arena[a, i]
                    i += 1
                else:
                    arena[a, out] = new_below[a, j]
                    j += 1
                out += 1
            # Above child: pushed first, popped last.
            task_start[top, a] = start[a]
            task_count[top, a] = above_count
            task_start[top + 1, a] = start[a] + above_count
            task_count[top + 1, a] = out - start[a] - above_count
        # Every triangle of the cell back to BOTH for the next cell (one-sided ones from axis 2's copies).
        for i in range(scratch_end[2] - count[2], scratch_end[2]):
            if i < scratch_end[2] - count[2] + n_only_below[2] or i >= scratch_end[2] - n_only_above[2]:
                side[(arena[2, i] & LOW32) >> 2] = BOTH
        for j in range(6):
            task_box[top, j] = box[j]
            task_box[top + 1, j] = box[j]
        task_box[top, axis] = split
        task_box[top + 1, 3 + axis] = split
        task_depth[top] = depth + 1
        task_depth[top + 1] = depth + 1
        task_parent[top] = node
        task_parent[top + 1] = node
        task_above[top] = True
        task_above[top + 1] = False
        task_bad[top] = bad + bad_split
        task_bad[top + 1] = bad + bad_split
        task_tris[top] = n - n_below_only
        task_tris[top + 1] = n - n_above_only
        top += 2
    return (nodes[:n_nodes].copy(), refs[:n_refs, 0].copy(), deferred_events,
            deferred_start[:n_deferred].copy(), deferred_count[:n_deferred].copy(),
            deferred_box[:n_deferred].copy(), deferred_depth[:n_deferred].copy(),
            deferred_tris[:n_deferred, 0].copy())


@numba.njit(cache=True, error_model="numpy")
def stitch_subtrees(top, top_refs, subtrees, subtree_base, subtree_refs, subtree_ref_base):
    """One binary tree (depth-first, below child = node + 1) from the top tree `top` whose DEFERRED
    nodes k stand for the subtrees subtrees[subtree_base[k]:subtree_base[k + 1]] (their links local);
    leaves get their references copied in the new order. Returns (nodes, refs)."""
    n_subtrees = subtree_base.shape[0] - 1
    nodes = np.zeros((top.shape[0] - n_subtrees + subtrees.shape[0], 8), np.int32)
    refs = np.empty(top_refs.shape[0] + subtree_refs.shape[0], np.int32)
    stack_tree = np.empty(256, np.int64)                   # -1: the top tree, k: subtree k
    stack_node = np.empty(256, np.int64)
    stack_parent = np.empty(256, np.int64)
    stack_tree[0], stack_node[0], stack_parent[0] = -1, 0, -1
    top_of_stack, m, n_refs = 1, 0, 0
    while top_of_stack > 0:
        top_of_stack -= 1
        k, b, parent = stack_tree[top_of_stack], stack_node[top_of_stack], stack_parent[top_of_stack]
        if k < 0 and top[b, 0] == DEFERRED:
            k, b = top[b, 2], 0
        source = top if k < 0 else subtrees[subtree_base[k]:subtree_base[k + 1]]
        node = m
        m += 1
        if parent >= 0:
            nodes[parent, 2] = node
        if source[b, 0] == LEAF:
            first, count = source[b, 2], source[b, 3]
            nodes[node, 0], nodes[node, 2], nodes[node, 3] = LEAF, n_refs, count
            for j in range(count):
                refs[n_refs] = top_refs[first + j] if k < 0 else subtree_refs[subtree_ref_base[k] + first + j]
                n_refs += 1
            continue
        nodes[node, 0], nodes[node, 1] = source[b, 0], source[b, 1]
        for side in range(2):                      # above pushed first, below popped next
            stack_tree[top_of_stack] = k
            stack_node[top_of_stack] = source[b, 2] if side == 0 else b + 1
            stack_parent[top_of_stack] = node if side == 0 else -1
            top_of_stack += 1
    return nodes[:m].copy(), refs[:n_refs].copy()


TREELET_LEVELS = 4                      # kd levels per record: 15 inner positions, 16 slots below them
SLOTS = 1 << TREELET_LEVELS
RECORD_WORDS = 2 * SLOTS                # 15 splits, the meta word, 16 slot links: 128 bytes
META_WORD = SLOTS - 1
INLINE_COUNT_BITS = 3                   # a leaf of < 8 references fits in its parent's link word ...
INLINE_DUP_BIT = 1 << INLINE_COUNT_BITS  # ... with a flag: it holds a triangle referenced elsewhere too
INLINE_SHIFT = INLINE_COUNT_BITS + 1
INLINE_FIRST_LIMIT = 1 << 26            # -2 - (first << 4 | ...) stays an int32
EMPTY_LINK = -1


@numba.njit(cache=True, error_model="numpy")
def _any_duplicated(dup_ref, first, count):
    for k in range(first, first + count):
        if dup_ref[k]:
            return 1
    return 0


@numba.njit(cache=True, error_model="numpy")
def _fits_link(first, count):
    """Whether a leaf of `count` references from `first` fits in its parent's link word."""
    return count < (1 << INLINE_COUNT_BITS) and first < INLINE_FIRST_LIMIT


@numba.njit(cache=True, error_model="numpy")
def _leaf_link(first, count, dup):
    """Link word of a leaf kept in its parent: -1 if empty, else -2 - (first << 4 | dup << 3 | count)."""
    if count == 0:
        return EMPTY_LINK
    return -2 - ((first << INLINE_SHIFT) | (dup * INLINE_DUP_BIT) | count)


@numba.njit(cache=True, error_model="numpy")
def pack_records(binary, dup_ref):
    """Pack the binary tree (M, 8) int32 of `build_kdtree_kernel` into treelet records (R, 32) int32;
    dup_ref (refs,) bool marks the references whose triangle is referenced more than once.

    Layout: `tracer.accel.kdtree`. Records are written depth-first, the record of a treelet's first slot
    following it, so a ray going down the below sides reads consecutive memory.
    """
    n_binary = binary.shape[0]
    # At most one record per inner node (a treelet's root) and per leaf too big for a link word.
    n_records_max = 1
    for b in range(n_binary):
        n_records_max += binary[b, 0] != LEAF or not _fits_link(binary[b, 2], binary[b, 3])
    records = np.zeros((n_records_max, RECORD_WORDS), np.int32)
    nan_bits = np.array([np.nan], np.float32).view(np.int32)[0]
    # Work items: binary node whose link is still to be written into records[item_record, item_word].
    item_node = np.empty(n_binary + SLOTS, np.int64)
    item_record = np.empty(n_binary + SLOTS, np.int64)
    item_word = np.empty(n_binary + SLOTS, np.int64)
    position_node = np.empty(SLOTS - 1, np.int64)
    n_records = 1
    item_node[0], item_record[0], item_word[0] = 0, -1, -1
    top = 1
    while top > 0:
        top -= 1
        b, parent, word = item_node[top], item_record[top], item_word[top]
        r = 0 if parent < 0 else n_records
        if parent >= 0:
            n_records += 1
            records[parent, word] = r
        if binary[b, 0] == LEAF:                # the root leaf, or a leaf too big to inline
            first, count = binary[b, 2], binary[b, 3]
            records[r, META_WORD] = -1
            records[r, SLOTS], records[r, SLOTS + 1] = first, count
            records[r, SLOTS + 2] = _any_duplicated(dup_ref, first, count)
            continue
        # Positions in heap order: a NaN split marks one that is not an inner node of this treelet.
        meta = 0
        for p in range(SLOTS - 1):
            position_node[p] = -1
        position_node[0] = b
        for p in range(SLOTS - 1):
            node = position_node[p]
            if node < 0 or binary[node, 0] == LEAF:
                records[r, p] = nan_bits
                continue
            meta |= binary[node, 0] << (2 * p)
            records[r, p] = binary[node, 1]                 # split position (float32 bits)
            if 2 * p + 2 < SLOTS - 1:
                position_node[2 * p + 1] = node + 1
                position_node[2 * p + 2] = binary[node, 2]
        records[r, META_WORD] = meta
        # Slots, last first so the first slot's record is written next: the node a slot's path ends at
        # (a leaf above the bottom level covers a run of slots; the run's first slot holds it).
        for s in range(SLOTS - 1, -1, -1):
            node = b
            link = EMPTY_LINK
            for level in range(TREELET_LEVELS):
                node = node + 1 if (s >> (TREELET_LEVELS - 1 - level)) & 1 == 0 else binary[node, 2]
                if binary[node, 0] != LEAF and level < TREELET_LEVELS - 1:
                    continue
                if s & ((1 << (TREELET_LEVELS - 1 - level)) - 1) == 0:
                    first, count = binary[node, 2], binary[node, 3]
                    if binary[node, 0] == LEAF and _fits_link(first, count):
                        link = _leaf_link(first, count, _any_duplicated(dup_ref, first, count))
                    else:
                        item_node[top], item_record[top], item_word[top] = node, r, SLOTS + s
                        top += 1
                break
            records[r, SLOTS + s] = link
    return records[:n_records].copy()


@numba.njit(cache=True, error_model="numpy")
def unpack_records(records, binary):
    """The binary tree of packed `records` into `binary` (M, 8) int32, M large enough (31 per record):
    depth-first, below child = node + 1, inner i[0] = axis, f[1] = split, i[2] = above child; leaf
    i[0] = 3, i[2] = first reference, i[3] = count (empty leaves included). Returns M."""
    splits = records.view(np.float32)
    # Stack items: (record, heap position) of a node inside a record, or (-1, link word).
    stack_r = np.empty(1024, np.int64)
    stack_p = np.empty(1024, np.int64)
    stack_parent = np.empty(1024, np.int64)
    stack_r[0], stack_p[0], stack_parent[0] = 0, 0, -1
    top, m = 1, 0
    while top > 0:
        top -= 1
        r, p, parent = stack_r[top], stack_p[top], stack_parent[top]
        node = m
        m += 1
        if parent >= 0:
            binary[parent, 2] = node                       # the above child
        for j in range(8):
            binary[node, j] = 0
        if r < 0:                                          # a link word: empty, inline leaf, or record
            link = p
            if link <= EMPTY_LINK:
                binary[node, 0] = LEAF
                if link < EMPTY_LINK:
                    code = -2 - link
                    binary[node, 2] = code >> INLINE_SHIFT
                    binary[node, 3] = code & ((1 << INLINE_COUNT_BITS) - 1)
                continue
            r, p = link, 0
        if records[r, META_WORD] < 0:
            binary[node, 0], binary[node, 2], binary[node, 3] = LEAF, records[r, SLOTS], records[r, SLOTS + 1]
            continue
        binary[node, 0] = (records[r, META_WORD] >> (2 * p)) & 3
        binary[node, 1] = records[r, p]
        level = 0
        while (2 << level) - 1 <= p:
            level += 1
        for side in (1, 0):                                # above pushed first, below popped next
            c = 2 * p + 1 + side
            if c < SLOTS - 1 and not np.isnan(splits[r, c]):
                stack_r[top], stack_p[top] = r, c
            else:                                          # a slot run: its first slot holds the link
                first_slot = (c - ((2 << level) - 1)) << (TREELET_LEVELS - 1 - level)
                stack_r[top], stack_p[top] = -1, records[r, SLOTS + first_slot]
            stack_parent[top] = node if side == 1 else -1
            top += 1
    return m


@numba.njit(cache=True, error_model="numpy")
def cell_boxes(nodes_f, nodes_i, bounds, depth, cells):
    """Depth (N,) and cell box (N, 6) of every node, from the root `bounds` and the split planes."""
    depth[0] = 0
    cells[0] = bounds
    for n in range(nodes_i.shape[0]):
        axis = nodes_i[n, 0]
        if axis == LEAF:
            continue
        below, above = n + 1, nodes_i[n, 2]
        cells[below] = cells[n]
        cells[above] = cells[n]
        cells[below, 3 + axis] = nodes_f[n, 1]
        cells[above, axis] = nodes_f[n, 1]
        depth[below] = depth[n] + 1
        depth[above] = depth[n] + 1

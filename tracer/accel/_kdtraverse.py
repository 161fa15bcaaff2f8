"""kd-tree traversal kernels: front-to-back closest hit and any hit, with mailboxing.

The classic stack traversal (Jansen 1986; Havran (2000), "Heuristic Ray Shooting Algorithms", PhD thesis,
Czech Technical University in Prague; Pharr, Jakob & Humphreys, "Physically Based Rendering", 3rd ed.,
section 4.4, from memory): the ray is clipped to the scene box with the slab test (Kay & Kajiya 1986),
giving the interval [t_min, t_max] of the root cell; at an inner node the plane distance
t_split = (split - o[axis]) / d[axis] decides whether the interval lies on the near side, the far side,
or both; in the last case the far child is pushed with [t_split, t_max] and the near child visited with
[t_min, t_split]. Cells are visited in ray order, so the walk ends as soon as the closest hit so far
lies before every pending cell: popped cells starting beyond the hit are dropped. That is the early
exit: with the disjoint intervals of a kd-tree it ends the walk once the hit lies inside the current
cell (t_hit <= t_max of the cell).

The tree is read as treelet records (layout: `tracer.accel.kdtree`): a stack entry is a position inside a
record (record * 8 + position), so a ray walks up to three levels inside one record before it loads the
next; empty leaves are never visited and small leaves sit in their parent's link word. "Nodes visited"
counts the records loaded (a pop reloads one) plus the leaves kept in links, so it measures memory
traffic like the BVH's count of 4-wide records; "triangles tested" counts real triangle tests.

Edge cases (common practice, the classic kd-tree pitfalls):
- a ray parallel to the split plane (d[axis] = 0) stays on its side; if it lies in the plane it visits
  both children over the same interval, because a triangle touching the plane from either side can be
  hit (the box-face rays). Such a push shares its t_min with the cell, which is why the pop loop skips
  rather than stops;
- a ray starting on the plane moves into one side; the side it leaves is still visited over [0, 0]
  when the origin is in the cell, since a triangle lying in the plane may be stored there (brute force
  finds it at t = 0+, and so must we);
- the sign of t_split is exact (p - o, then a multiplication or, when 1/d overflows, a division), so
  "behind the origin" is decided exactly; t_split within a relative `SLACK` of the cell's ends counts as
  inside the interval (both children are visited), so rounding of t cannot skip a cell that the ray
  enters by a sliver at a corner;
- triangles lying in a split plane are stored on one side by the build; a ray crossing the plane visits
  both sides, and one lying in the plane cannot hit them (a flat triangle seen edge-on).

Mailboxing (Amanatides & Woo 1987, "A Fast Voxel Traversal Algorithm for Ray Tracing", Eurographics;
here with a ray-local list instead of a per-triangle ray id): the ids of the last `MAILBOX_SIZE`
triangles tested by this ray sit in the top of the caller's `stack_i` (the build keeps the depth, hence
the stack, below `MAILBOX_BASE`); a reference whose triangle is in the list is skipped, so a triangle
duplicated across leaves is tested once (for the first MAILBOX_SIZE triangles a ray tests; later ones
are remembered in a ring).
"""
import numba
import numpy as np
from numba.core import cgutils, types
from numba.extending import intrinsic

from tracer.accel._kdbuild import EMPTY_LINK as EMPTY
from tracer.accel._kdbuild import INLINE_COUNT_BITS
from tracer.accel._triangle import INF32, hit_triangle
from tracer.accel.tree import STACK_SIZE

F32 = np.float32
MAILBOX_SIZE = 64                       # a power of two (ring index by mask)
MAILBOX_BASE = STACK_SIZE - MAILBOX_SIZE
MAX_TRAVERSAL_DEPTH = MAILBOX_BASE      # the build refuses deeper trees
SLACK = F32(1e-6)                       # relative tolerance on t_split against the cell's interval


@intrinsic
def _borrow(typingctx, array):
    """`array` without its reference count (null meminfo): reading an array out of the `Tree` tuple and
    passing it on makes numba add to and take from its shared reference count, two atomic operations
    per array and ray. Safe while the tree outlives the view, which is only passed down."""
    if not isinstance(array, types.Array):
        return None

    def codegen(context, builder, signature, args):
        view = cgutils.create_struct_proxy(signature.args[0])(context, builder, value=args[0])
        view.meminfo = cgutils.get_null_value(view.meminfo.type)
        view.parent = cgutils.get_null_value(view.parent.type)
        return view._getvalue()

    return array(array), codegen


@numba.njit(cache=True, error_model="numpy", inline="always")
def _slab(lo, hi, o, d, t0, t1):
    """Narrow [t0, t1] to the slab lo <= o + t d <= hi; an empty slab gives t0 > t1."""
    if d == F32(0.0):
        if o < lo or o > hi:
            return F32(1.0), F32(0.0)
        return t0, t1
    ta = (lo - o) / d               # a division, not * (1/d): exact also for the tiniest d
    tb = (hi - o) / d
    return max(t0, min(ta, tb)), min(t1, max(ta, tb))


@numba.njit(cache=True, error_model="numpy", inline="always")
def _child_entry(nodes_i, r, p, kinds, side):
    """Entry code of child `side` (0 below, 1 above) of position p of record r: r * 8 + position for a
    node in the same record, link * 8 for another record, the link itself (< -1) for an inline leaf,
    -1 for an empty leaf."""
    if p < 3:
        c = 2 * p + 1 + side
        if (kinds >> (2 * c)) & 3 != 3:
            return r * 8 + c
        link = nodes_i[r, 1 + c]
    else:
        link = nodes_i[r, 8 + 2 * (p - 3) + side]
    return link * 8 if link >= 0 else link


@numba.njit(cache=True, error_model="numpy")
def _kd_traverse(nodes_f, nodes_i, refs, leaf_tris, bounds, stack_i, stack_f, ray, t_max, any_hit):
    o, d = ray[0], ray[1]
    # Per axis, in the caller's scratch above the stack (an array: indexing the ray tuple by a run-time
    # axis compiles to a branch per axis): origin, direction and 1/d exactly (make_ray clamps |d| <
    # 1e-35 for its slab test); 1/d is inf when it overflows, and then t_split divides instead.
    axis_data = stack_f[MAILBOX_BASE:MAILBOX_BASE + 6]
    for a in range(3):
        axis_data[a, 0] = o[a]
        axis_data[a, 1] = d[a]
        axis_data[3 + a, 0] = F32(1.0) / d[a]
    t_best, best_k, best_u, best_v = t_max, -1, F32(0.0), F32(0.0)
    # The root cell's interval: the slab test per axis (Kay & Kajiya 1986), parallel axes by position.
    t_lo, t_hi = F32(0.0), t_max
    t_lo, t_hi = _slab(bounds[0], bounds[3], o[0], d[0], t_lo, t_hi)
    t_lo, t_hi = _slab(bounds[1], bounds[4], o[1], d[1], t_lo, t_hi)
    t_lo, t_hi = _slab(bounds[2], bounds[5], o[2], d[2], t_lo, t_hi)
    if not t_lo <= t_hi * (F32(1.0) + SLACK):
        return t_best, best_k, best_u, best_v, 1, 0
    nodes, tested, top, entry = 1, 0, 0, 0
    while True:
        first_ref, count = 0, 0
        if entry >= 0:
            r, p = entry >> 3, entry & 7
            kinds = nodes_i[r, 0]
            if kinds >= 0:
                axis = (kinds >> (2 * p)) & 3
                split = nodes_f[r, 1 + p]
                oa, da = axis_data[axis, 0], axis_data[axis, 1]
                # The side to visit now (over [t_lo, first_hi]) and the side to push, if any (over
                # [second_lo, second_hi]); 0 = below, 1 = above.
                second = -1
                second_lo, second_hi, first_hi = t_lo, t_hi, t_hi
                if da == F32(0.0):
                    if oa < split:
                        first = 0
                    elif oa > split:
                        first = 1
                    else:                               # the ray lies in the plane: both sides
                        first, second = 0, 1
                else:
                    if oa == split:
                        t_split = F32(0.0)
                    else:
                        inv_a = axis_data[3 + axis, 0]
                        t_split = (split - oa) * inv_a if abs(inv_a) != INF32 else (split - oa) / da
                    near = np.int64(oa > split) | (np.int64(oa == split) & np.int64(da > F32(0.0)))
                    if t_split == F32(0.0) and t_lo == F32(0.0):
                        # The origin lies on the plane, in this cell: the side it leaves is touched at
                        # t = 0 only, but a triangle lying in the plane may be stored there (hit at 0+).
                        first, second, first_hi = 1 - near, near, t_lo
                    else:
                        # Near side only when the plane is behind the ray or beyond the cell, far side
                        # only when the ray crossed it before the cell, else both; as 0/1 arithmetic
                        # and selects, not branches: the outcome is data-dependent (measured 15%).
                        beyond = t_split > t_hi * (F32(1.0) + SLACK)
                        near_only = np.int64(t_split <= F32(0.0)) | np.int64(beyond)
                        crossed = np.int64(t_split < t_lo * (F32(1.0) - SLACK))
                        far_only = (1 - near_only) & crossed
                        both = (1 - near_only) & (1 - crossed)
                        first = near ^ far_only
                        second = 1 - near if both else -1
                        first_hi = t_split if both else t_hi
                        second_lo = t_split
                first = _child_entry(nodes_i, r, p, kinds, first)
                if second >= 0:
                    second = _child_entry(nodes_i, r, p, kinds, second)
                if first == EMPTY:                      # empty leaves are never visited
                    first, first_hi, t_lo, second = second, second_hi, second_lo, EMPTY
                if second != EMPTY:
                    stack_i[top] = second
                    stack_f[top, 0] = second_lo
                    stack_f[top, 1] = second_hi
                    top += 1
                if first != EMPTY:
                    if first < 0 or first >> 3 != r:
                        nodes += 1                      # another record, or a leaf kept in a link
                    entry, t_hi = first, first_hi
                    continue
            else:
                first_ref, count = nodes_i[r, 1], nodes_i[r, 2]
        else:
            code = -2 - entry
            first_ref, count = code >> INLINE_COUNT_BITS, code & ((1 << INLINE_COUNT_BITS) - 1)
        for k in range(first_ref, first_ref + count):
            tri = refs[k]
            seen = False
            for j in range(min(tested, MAILBOX_SIZE)):
                if stack_i[MAILBOX_BASE + j] == tri:
                    seen = True
                    break
            if seen:
                continue
            stack_i[MAILBOX_BASE + (tested & (MAILBOX_SIZE - 1))] = tri
            tested += 1
            t, u, v = hit_triangle(leaf_tris, k, ray, t_best)
            if t < t_best:
                t_best, best_k, best_u, best_v = t, k, u, v
                if any_hit:
                    return t_best, best_k, best_u, best_v, nodes, tested
        # Pop the next pending cell that starts before the closest hit (early exit when none does).
        found = False
        while top > 0:
            top -= 1
            if stack_f[top, 0] <= t_best:
                entry, t_lo, t_hi = stack_i[top], stack_f[top, 0], stack_f[top, 1]
                nodes += 1
                found = True
                break
        if not found:
            break
    return t_best, best_k, best_u, best_v, nodes, tested


@numba.njit(cache=True, error_model="numpy")
def kd_closest_hit(tree, stack_i, stack_f, ray, t_max):
    """Nearest hit with 0 < t < t_max: (t, reference, u, v, nodes visited, triangles tested).

    `stack_i` (STACK_SIZE,) int32 and `stack_f` (STACK_SIZE, 2) float32 are the caller's scratch: the
    pending far cells (node, t_min, t_max) and, in stack_i[MAILBOX_BASE:], the mailbox.
    """
    return _kd_traverse(_borrow(tree.nodes_f), _borrow(tree.nodes_i), _borrow(tree.refs),
                        _borrow(tree.leaf_tris), _borrow(tree.bounds), _borrow(stack_i), _borrow(stack_f),
                        ray, t_max, False)


@numba.njit(cache=True, error_model="numpy")
def kd_any_hit(tree, stack_i, stack_f, ray, t_max):
    """Whether anything lies at 0 < t < t_max: (hit, nodes visited, triangles tested)."""
    t, k, u, v, nodes, tested = _kd_traverse(
        _borrow(tree.nodes_f), _borrow(tree.nodes_i), _borrow(tree.refs), _borrow(tree.leaf_tris),
        _borrow(tree.bounds), _borrow(stack_i), _borrow(stack_f), ray, t_max, True)
    return k >= 0, nodes, tested


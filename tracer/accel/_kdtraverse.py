"""kd-tree traversal kernel: front-to-back closest hit and any hit with mailboxing, one ray at a time.

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

The tree is read as treelet records (layout: `tracer.accel.kdtree`): a walk position is an entry code,
record * 8 + position for a node inside a record, or a leaf link (< -1); a ray walks up to three levels
inside one record before it loads the next; empty leaves are never visited and small leaves sit in
their parent's link word.

The per-level step is the common case first: one multiplication gives t_split, and the near / far /
both choice and the two child entries are 0/1 arithmetic and selects, not branches (the outcome is as
good as random from node to node; measured 15% for the choice alone). The exact case analysis below
runs only at t_split exactly 0, or at every level of a ray with an infinite component of 1/d (an
axis-parallel ray): a branch the predictor learns. The push is a store that is always made and a stack
top advanced by 0 or 1.

Edge cases (common practice, the classic kd-tree pitfalls), in `_exact_sides`:
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
triangles tested by this ray sit in the top of the ray's scratch (the build keeps the depth, hence the
stack, below `MAILBOX_BASE`); a reference whose triangle is in the list is skipped, so a triangle
duplicated across leaves is tested once (for the first MAILBOX_SIZE triangles a ray tests; later ones
are remembered in a ring).

Counting: "nodes visited" counts the records loaded (the root, every record the walk moves into, and a
pop, which reloads one) plus the leaves kept in links, so it measures memory traffic like the BVH's
count of 4-wide records; an empty leaf is never visited and counts nothing. "Triangles tested" counts
the triangle tests actually made (a mailboxed repeat is not one).

Speed (per-ray walk; `benchmarks/bench_kdtree.py` on the 1M-triangle demo): the walk is a chain of
dependent steps per level (load the split, subtract, multiply, compare, pick the child), so the code
keeps that chain short: the ray's origin and 1/d stay in registers and are picked by the axis with
selects (a load indexed by the axis sat on the chain), and both children's entries are read before the
plane test decides between them. A stream of several rays in flight per thread with prefetching (as the
BVH's `intersect_rays` has) was written and measured slower than this walk by 10-40% on both camera and
diffuse-bounce rays (the records in use stay in cache, and switching rays costs state traffic and
branch history), so `Accel.intersect` runs this walk too.
"""
import numba
import numpy as np
from numba.core import types
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
DONE = EMPTY                            # entry code of a finished walk (no walk ever enters an empty leaf)
RECORD_WORDS = 16                       # int32 words of a treelet record (tracer.accel.kdtree)
# Kind bits (2 per position) of positions 7..14, the children of the record's bottom level: always links.
BOTTOM_LINKS = sum(3 << (2 * c) for c in range(7, 15))


@intrinsic
def _address(typingctx, array):
    """The data pointer of a C-contiguous array: indexed as a flat array, with no reference count and no
    negative-index check (an index is never negative here). `kd_traverse` reads its arrays this way:
    one instruction less per access on the chain of each level, and no reference counting of arrays
    passed to inlined helpers (numba cannot drop the pair around a helper with loops: it cost a dozen
    calls per step in a trial)."""
    if not (isinstance(array, types.Array) and array.layout == "C"):
        return None
    sig = types.CPointer(array.dtype)(array)

    def codegen(context, builder, signature, args):
        return context.make_array(signature.args[0])(context, builder, args[0]).data

    return sig, codegen


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
def _root_interval(ray, t_max, bounds):
    """The root cell's interval: the slab test per axis (Kay & Kajiya 1986), parallel axes by position.
    Returns (entry, t_lo, t_hi): the root, or DONE when the ray misses the scene box."""
    o, d = ray[0], ray[1]
    t_lo, t_hi = F32(0.0), t_max
    t_lo, t_hi = _slab(bounds[0], bounds[3], o[0], d[0], t_lo, t_hi)
    t_lo, t_hi = _slab(bounds[1], bounds[4], o[1], d[1], t_lo, t_hi)
    t_lo, t_hi = _slab(bounds[2], bounds[5], o[2], d[2], t_lo, t_hi)
    entry = 0 if t_lo <= t_hi * (F32(1.0) + SLACK) else DONE
    return entry, t_lo, t_hi


@numba.njit(cache=True, error_model="numpy", inline="always")
def _general_sides(t_split, near, t_lo, t_hi):
    """(first side, both, first_hi) for a plane at t_split != 0 (first = near or far side; 0 below, 1
    above): near side only when the plane is behind the ray or beyond the cell, far side only when the
    ray crossed it before the cell, else both, the near one first over [t_lo, t_split]."""
    near_only = np.int64(t_split <= F32(0.0)) | np.int64(t_split > t_hi * (F32(1.0) + SLACK))
    crossed = np.int64(t_split < t_lo * (F32(1.0) - SLACK))
    both = (1 - near_only) & (1 - crossed)
    first = near ^ ((1 - near_only) & crossed)
    return first, both, (t_split if both else t_hi)


@numba.njit(cache=True, error_model="numpy")
def _exact_sides(oa, da, split, inv_a, t_lo, t_hi):
    """The full case analysis of a plane (see the module docstring): (first side, both, first_hi,
    second_lo); when both, the second side is the other one, over [second_lo, t_hi]."""
    if da == F32(0.0):
        if oa < split:
            return 0, 0, t_hi, t_lo
        if oa > split:
            return 1, 0, t_hi, t_lo
        return 0, 1, t_hi, t_lo                     # the ray lies in the plane: both sides
    if oa == split:
        t_split = F32(0.0)
    else:
        t_split = (split - oa) * inv_a if abs(inv_a) != INF32 else (split - oa) / da
    near = np.int64(oa > split) | (np.int64(oa == split) & np.int64(da > F32(0.0)))
    if t_split == F32(0.0) and t_lo == F32(0.0):
        # The origin lies on the plane, in this cell: the side it leaves is touched at t = 0 only, but a
        # triangle lying in the plane may be stored there (hit at 0+).
        return 1 - near, 1, t_lo, t_lo
    first, both, first_hi = _general_sides(t_split, near, t_lo, t_hi)
    return first, both, first_hi, t_split


@numba.njit(cache=True, error_model="numpy", inline="always")
def _child_entry(nodes_i, r, links, c):
    """Entry code of position c (1..14) of record r (`nodes_i` its flat words): r * 8 + c for a node in
    the same record, link * 8 for another record, the link itself (< -1) for an inline leaf, -1 for an
    empty leaf. The word of position c's link is 1 + c for c < 7 and 8 + 2 (p - 3) + side = 1 + c for
    the children of p >= 3."""
    link = np.int64(nodes_i[r * RECORD_WORDS + 1 + c])
    outside = link * 8 if link >= 0 else link
    return outside if (links >> (2 * c)) & 3 == 3 else r * 8 + c


@numba.njit(cache=True, error_model="numpy")
def kd_traverse(nodes_f, nodes_i, refs, leaf_tris, bounds, stack_i, stack_f, ray, t_max, any_hit):
    """One ray's walk: (t, reference, u, v, nodes visited, triangles tested); t = t_max and reference -1
    when nothing lies at 0 < t < t_max (with `any_hit`, the walk stops at the first hit found).

    `stack_i` (STACK_SIZE,) int32 and `stack_f` (STACK_SIZE, 2) float32 are the caller's scratch: the
    pending far cells (entry, t_min, t_max) and, in stack_i[MAILBOX_BASE:], the mailbox.
    `_traverse.closest_hit` / `any_hit` call it with borrowed arrays (`_traverse._borrow`). Inside, the
    arrays are read through their data pointers (`_address`), as flat arrays.
    """
    entry, t_lo, t_hi = _root_interval(ray, t_max, bounds)
    # Per axis: origin, direction and the exact 1/d (inf when it overflows, and then t_split divides;
    # make_ray's 1/d is clamped for the slab test).
    (ox, oy, oz), (dx, dy, dz) = ray[0], ray[1]
    ix, iy, iz = F32(1.0) / dx, F32(1.0) / dy, F32(1.0) / dz
    # A ray with an infinite 1/d (an axis-parallel one) takes the exact case analysis at every level.
    # (This use of ix, iy, iz also keeps LLVM from turning the per-level pick of 1/d into a division.)
    parallel = abs(ix) == INF32 or abs(iy) == INF32 or abs(iz) == INF32
    n_refs = leaf_tris.shape[0]
    nodes_f, nodes_i, refs, stack_i, stack_f = (_address(nodes_f), _address(nodes_i), _address(refs),
                                                _address(stack_i), _address(stack_f))
    top, t_best, best_k, best_u, best_v, nodes, tested = 0, t_max, -1, F32(0.0), F32(0.0), 1, 0
    triangles = numba.carray(_address(leaf_tris), (n_refs, 9))
    while entry != DONE:
        first_ref, count = 0, 0
        if entry >= 0:
            r, p = entry >> 3, entry & 7
            kinds = np.int64(nodes_i[r * RECORD_WORDS])
            if kinds >= 0:
                links = kinds | BOTTOM_LINKS
                while True:
                    axis = (kinds >> (2 * p)) & 3
                    split = nodes_f[r * RECORD_WORDS + 1 + p]
                    # Selects rather than a load at the axis: a shorter chain from one level to the next.
                    oa = ox if axis == 0 else (oy if axis == 1 else oz)
                    inv_a = ix if axis == 0 else (iy if axis == 1 else iz)
                    t_split = (split - oa) * inv_a
                    if parallel or t_split == F32(0.0):
                        da = dx if axis == 0 else (dy if axis == 1 else dz)
                        first, both, first_hi, second_lo = _exact_sides(oa, da, split, inv_a, t_lo, t_hi)
                    else:
                        first, both, first_hi = _general_sides(t_split, np.int64(oa > split), t_lo, t_hi)
                        second_lo = t_split
                    # Both children's entries are read before the plane test decides (they depend on the
                    # position only, so the loads overlap the arithmetic) and picked by selects.
                    below = _child_entry(nodes_i, r, links, 2 * p + 1)
                    above = _child_entry(nodes_i, r, links, 2 * p + 2)
                    first_entry = above if first else below
                    second_entry = (below if first else above) if both else EMPTY
                    # Empty leaves are never visited: an empty first side hands over to the second; the
                    # second is pushed when both are there (the store is made anyway, top moves by 0 or 1).
                    first_empty = first_entry == EMPTY
                    stack_i[top] = second_entry
                    stack_f[2 * top] = second_lo
                    stack_f[2 * top + 1] = t_hi
                    top += np.int64(not first_empty) & np.int64(second_entry != EMPTY)
                    entry = second_entry if first_empty else first_entry
                    t_lo = second_lo if first_empty else t_lo
                    t_hi = t_hi if first_empty else first_hi
                    if entry >> 3 != r:             # out of the record: a link, a leaf, or nothing (< 0)
                        break
                    p = entry & 7
                if entry != EMPTY:
                    nodes += 1                          # another record, or a leaf kept in a link
                    continue
            else:
                first_ref, count = nodes_i[r * RECORD_WORDS + 1], nodes_i[r * RECORD_WORDS + 2]
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
            t, u, v = hit_triangle(triangles, k, ray, t_best)
            if t < t_best:
                t_best, best_k, best_u, best_v = t, k, u, v
                if any_hit:
                    top = 0                             # nothing more to pop: the walk is over
                    break
        # Pop the next pending cell that starts before the closest hit (early exit when none does).
        entry = DONE
        while top > 0:
            top -= 1
            if stack_f[2 * top] <= t_best:
                entry, t_lo, t_hi = np.int64(stack_i[top]), stack_f[2 * top], stack_f[2 * top + 1]
                nodes += 1
                break
    return t_best, best_k, best_u, best_v, nodes, tested

"""kd-tree traversal kernel: front-to-back closest hit and any hit with mailboxing, one ray at a time.

The classic stack traversal (Jansen 1986; Havran (2000), "Heuristic Ray Shooting Algorithms", PhD thesis,
Czech Technical University in Prague; Pharr, Jakob & Humphreys, "Physically Based Rendering", 3rd ed.,
section 4.4, from memory): the ray is clipped to the scene box with the slab test (Kay & Kajiya 1986),
giving the interval [t_min, t_max] of the root cell; a split plane at t_split = (split - o[axis]) / d[axis]
divides a cell's interval between its two children; cells are visited in ray order, the farther ones
waiting on a stack with their intervals, and the walk ends as soon as the closest hit so far lies before
every pending cell: popped cells starting beyond the hit are dropped. That is the early exit: with the
disjoint intervals of a kd-tree it ends the walk once the hit lies inside the current cell.

Four levels at a time. The tree is read as treelet records (layout: `tracer.accel.kdtree`): 15 inner
positions in heap order above 16 slots, each slot the cell at the end of one path of four below / above
choices (a leaf met higher up covers a run of slots; the run's first slot holds it). Instead of deciding
the levels one after another (load the split, subtract, multiply, compare, pick the child: a chain of
dependent steps per level), `_treelet` computes the 15 plane distances at once and gives every slot its
interval as 16-lane vector operations: a slot's cell is the intersection of the half-spaces on its path,
so its interval along the ray is [max(t_min, t_split of the planes it lies beyond), min(t_max, t_split of
the planes it lies before)]: the below side of a plane lies before t_split when d[axis] > 0 (or the ray
is parallel with its origin below), after it when d[axis] < 0. A slot is entered when its interval is
not empty and its link is not an empty leaf. The entered slots are visited front to back: the nearest
next, the others pushed farthest first (and their records or first triangles prefetched: 4% on
diffuse-bounce rays). The front-to-back order is the tree order with the near side
first at each plane, so a slot's rank is its index with each level's bit flipped where that level's
plane has d[axis] < 0: no sort of distances. (The same walk one level at a time measured 1.5-1.9x
slower on the 1M-triangle demo: `benchmarks/bench_kdtree.py`.)

Edge cases (common practice, the classic kd-tree pitfalls), all in the interval rule:
- t_split = (split - o) * (1/d), or (split - o) / d for a ray with a 1/d that overflows (d subnormal or
  0, an axis-parallel ray): the sign of t_split, and whether it is 0, are exact;
- a ray parallel to a plane (d[axis] = +-0) gets t_split = +-inf: the side holding the origin keeps the
  whole interval and the other side gets none (the sign of the zero is the side: -0 counts as
  negative, consistently in t_split and in the before / after choice); a ray lying in the plane gets
  0 * inf = NaN, which bounds neither side: both children are visited over the whole interval, since a
  triangle touching the plane from either side can be hit (the box-face rays);
- a ray starting on a plane (t_split = 0) in the current cell visits the side it leaves over [0, 0]:
  a triangle lying in the plane may be stored there (brute force finds it at t = 0+, and so must we);
- an interval counts as not empty while t_lo <= t_hi (1 + SLACK), so rounding of t cannot skip a cell
  that the ray enters by a sliver at a corner;
- triangles lying in a split plane are stored on one side by the build; a ray crossing the plane visits
  both sides, and one lying in the plane cannot hit them (a flat triangle seen edge-on).
An unused position's split is NaN: t_split is NaN and bounds nothing, like the plane a ray lies in.

Mailboxing (Amanatides & Woo 1987, "A Fast Voxel Traversal Algorithm for Ray Tracing", Eurographics;
here with a ray-local list instead of a per-triangle ray id): a leaf that holds a triangle referenced by
another leaf too is flagged by the build (a bit of its link word); its references go through the list of
the last `MAILBOX_SIZE` duplicated triangles this ray tested (the top of the ray's scratch, above the
stack), and one already in the list is skipped, so a triangle duplicated across leaves is tested once.
Other references cannot repeat within one ray (each cell is visited at most once) and skip the list.
(Checking every reference measured 5% slower on camera rays; no mailbox at all, 4% more tests.)

Counting: "nodes visited" counts the records and leaves the walk enters (the root, each one moved to, and
each pop), so it measures memory traffic like the BVH's count of 4-wide records; an empty leaf is never
entered and counts nothing. "Triangles tested" counts the triangle tests actually made (a mailboxed
repeat is not one).

Speed (`benchmarks/bench_kdtree.py` on the 1M-triangle demo, and CPU-time trials of variants against this
kernel, 1 thread): one walk per ray serves both paths (`Accel.intersect` and the integrator). Measured and
not kept: 3-level records of 64 bytes with 8 lanes (3-8% slower: more records per ray); visiting the
entered slots in lane order instead of by rank (camera rays 6% faster, diffuse-bounce rays 30% slower:
far cells first defeat the early exit); ranks computed in the vector step (no gain); the SAH with
K_T : K_I of 1, 1.5, 2.5 or 3 instead of 2 (2-15% slower: smaller leaves test fewer triangles but make a
bigger tree); two rays walked in one loop, interleaved (5-7% slower); with the earlier walk that decided
one level at a time, a stream of 8 rays in flight with prefetching, as the BVH's (10-40% slower).
"""
import numba
import numpy as np
from llvmlite import ir
from numba.core import cgutils, types
from numba.extending import intrinsic

from tracer.accel._kdbuild import (
    EMPTY_LINK,
    INLINE_COUNT_BITS,
    INLINE_SHIFT,
    META_WORD,
    RECORD_WORDS,
    SLOTS,
    TREELET_LEVELS,
)
from tracer.accel._triangle import INF32, hit_triangle
from tracer.accel.tree import STACK_SIZE

F32 = np.float32
MAILBOX_SIZE = 64                       # a power of two (ring index by mask)
MAILBOX_BASE = STACK_SIZE - MAILBOX_SIZE
MAX_TRAVERSAL_DEPTH = 64                # the build refuses deeper trees
# A record pushes at most SLOTS - 1 cells, and a leaf at depth D lies under ceil(D / 4) records.
assert -(-MAX_TRAVERSAL_DEPTH // TREELET_LEVELS) * (SLOTS - 1) <= MAILBOX_BASE
SCRATCH = 2 * MAILBOX_BASE              # stack_f words (flat) of the slot intervals: t_lo x 16, t_hi x 16
SLACK = 1e-6                            # relative tolerance of an interval's emptiness test
DONE = EMPTY_LINK                       # entry code of a finished walk (no walk ever enters an empty leaf)


@intrinsic
def _address(typingctx, array):
    """The data pointer of a C-contiguous array: indexed as a flat array, with no reference count and no
    negative-index check (an index is never negative here). `kd_traverse` reads its arrays this way:
    one instruction less per access, and no reference counting of arrays passed to inlined helpers."""
    if not (isinstance(array, types.Array) and array.layout == "C"):
        return None
    sig = types.CPointer(array.dtype)(array)

    def codegen(context, builder, signature, args):
        return context.make_array(signature.args[0])(context, builder, args[0]).data

    return sig, codegen


def emit_prefetch(builder, pointer):
    """Code for a hint to load the cache line at `pointer` (read, keep in all levels, data); no effect on
    results. Shared by the intrinsics that prefetch (`_prefetch`, `tracer.accel._traverse._fetch`)."""
    i8p, i32 = ir.IntType(8).as_pointer(), ir.IntType(32)
    prefetch = cgutils.get_or_insert_function(
        builder.module, ir.FunctionType(ir.VoidType(), [i8p, i32, i32, i32]), "llvm.prefetch.p0i8")
    builder.call(prefetch, [builder.bitcast(pointer, i8p), i32(0), i32(3), i32(1)])


@intrinsic
def _prefetch(typingctx, pointer, index):
    """Hint the CPU to load the cache line of pointer[index]. The pushed cells' records and triangles:
    loaded while the nearer cells are walked."""
    if not isinstance(pointer, types.CPointer):
        return None
    sig = types.void(pointer, types.int64)

    def codegen(context, builder, signature, args):
        pointer, index = args
        emit_prefetch(builder, builder.gep(pointer, [index]))
        return context.get_dummy_value()

    return sig, codegen


@intrinsic
def bit_count(typingctx, x, lowest):
    """With `lowest`, the index of the lowest set bit of x (x != 0), else the number of set bits (LLVM's
    cttz / ctpop: one instruction each on current x86-64 cores)."""
    sig = types.int64(types.int64, types.boolean)

    def codegen(context, builder, signature, args):
        x, lowest = args
        i64 = ir.IntType(64)
        ctpop = cgutils.get_or_insert_function(builder.module, ir.FunctionType(i64, [i64]), "llvm.ctpop.i64")
        cttz = cgutils.get_or_insert_function(builder.module, ir.FunctionType(i64, [i64, ir.IntType(1)]),
                                              "llvm.cttz.i64")
        return builder.select(lowest, builder.call(cttz, [x, ir.Constant(ir.IntType(1), 1)]),
                              builder.call(ctpop, [x]))

    return sig, codegen


@intrinsic
def _treelet(typingctx, nodes_f, r, ox, oy, oz, qx, qy, qz, divide, t_lo, t_hi, scratch):
    """The 16 slots of treelet record r for a ray in the cell [t_lo, t_hi], as 16-lane vector operations.

    (q = 1/d, or d itself with `divide` when some 1/d overflows.) Per position p: t_p = (split_p - o)
    * (1/d) (or / d) on p's axis. Per slot: the interval [lo, hi], narrowed by each of its four path
    planes: by t_p from below when the slot lies beyond the plane (below side and d < 0, or above side
    and d > 0; the sign bit of q, so -0 counts as negative), else from above (a NaN t_p narrows
    nothing). Writes lo to scratch[SCRATCH:SCRATCH + 16] and hi to the next 16 words; returns
    entered | negative << 16: bit s of `entered` set when slot s's interval is not empty (lo <= hi
    (1 + SLACK)) and its link is not an empty leaf, bit p of `negative` when position p's q < 0.
    Built as LLVM vector IR because numba does not run LLVM's SLP vectorizer.
    """
    f32 = types.float32
    sig = types.int64(nodes_f, types.int64, f32, f32, f32, f32, f32, f32, types.boolean, f32, f32, scratch)

    def codegen(context, builder, signature, args):
        nodes, r, ox, oy, oz, qx, qy, qz, divide, t_lo, t_hi, scratch = args
        i32, i64 = ir.IntType(32), ir.IntType(64)
        vf, vi = ir.VectorType(ir.FloatType(), SLOTS), ir.VectorType(i32, SLOTS)
        vb = ir.VectorType(ir.IntType(1), SLOTS)
        record = builder.gep(nodes, [builder.mul(r, ir.Constant(i64, RECORD_WORDS))])

        def at(pointer, word, ty):      # the value of type ty at word `word` of `pointer`
            return builder.bitcast(builder.gep(pointer, [ir.Constant(i64, word)]), ty.as_pointer())

        def lanes(ty, value):
            return ir.Constant(ty, value if isinstance(value, list) else [value] * SLOTS)

        def splat(x, ty):
            one = builder.insert_element(ir.Constant(ty, ir.Undefined), x, i32(0))
            return builder.shuffle_vector(one, one, lanes(vi, 0))

        def pick(v, lanes_of):          # per slot, the lane of its path's position at one level
            return builder.shuffle_vector(v, ir.Constant(v.type, ir.Undefined), lanes(vi, lanes_of))

        splits = builder.load(at(record, 0, vf), align=4)
        links = builder.load(at(record, SLOTS, vi), align=4)
        meta = builder.load(at(record, META_WORD, i32))
        # Axis of each position (2 bits of the meta word; lane 15, the meta word itself, is never used).
        axis = builder.and_(builder.lshr(splat(meta, vi), lanes(vi, [2 * min(p, 14) for p in range(SLOTS)])),
                            lanes(vi, 3))
        on_x = builder.icmp_signed("==", axis, lanes(vi, 0))
        on_y = builder.icmp_signed("==", axis, lanes(vi, 1))
        o = builder.select(on_x, splat(ox, vf), builder.select(on_y, splat(oy, vf), splat(oz, vf)))
        q = builder.select(on_x, splat(qx, vf), builder.select(on_y, splat(qy, vf), splat(qz, vf)))
        offset = builder.fsub(splits, o)
        with builder.if_else(divide) as (by_d, by_inverse):
            with by_d:
                t_div = builder.fdiv(offset, q)
                from_div = builder.basic_block
            with by_inverse:
                t_mul = builder.fmul(offset, q)
                from_mul = builder.basic_block
        t = builder.phi(vf)
        t.add_incoming(t_div, from_div)
        t.add_incoming(t_mul, from_mul)
        negative = builder.icmp_signed("<", builder.bitcast(q, vi), lanes(vi, 0))
        lo, hi = splat(t_lo, vf), splat(t_hi, vf)
        for level in range(TREELET_LEVELS):
            lanes_of = [(1 << level) - 1 + (s >> (TREELET_LEVELS - level)) for s in range(SLOTS)]
            side = [(s >> (TREELET_LEVELS - 1 - level)) & 1 for s in range(SLOTS)]
            t_level = pick(t, lanes_of)
            beyond = builder.xor(pick(negative, lanes_of), lanes(vb, side))
            lo = builder.select(builder.and_(beyond, builder.fcmp_ordered(">", t_level, lo)), t_level, lo)
            hi = builder.select(builder.and_(builder.not_(beyond), builder.fcmp_ordered("<", t_level, hi)),
                                t_level, hi)
        not_empty = builder.fcmp_ordered("<=", lo, builder.fmul(hi, lanes(vf, 1.0 + SLACK)))
        entered = builder.and_(not_empty, builder.icmp_signed("!=", links, lanes(vi, EMPTY_LINK)))
        builder.store(lo, at(scratch, SCRATCH, vf), align=4)
        builder.store(hi, at(scratch, SCRATCH + SLOTS, vf), align=4)
        mask_type = ir.IntType(SLOTS)
        entered_bits = builder.zext(builder.bitcast(entered, mask_type), i64)
        negative_bits = builder.zext(builder.bitcast(negative, mask_type), i64)
        return builder.or_(entered_bits, builder.shl(negative_bits, ir.Constant(i64, SLOTS)))

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
    Returns (entry, t_lo, t_hi): the root record 0, or DONE when the ray misses the scene box."""
    o, d = ray[0], ray[1]
    t_lo, t_hi = F32(0.0), t_max
    t_lo, t_hi = _slab(bounds[0], bounds[3], o[0], d[0], t_lo, t_hi)
    t_lo, t_hi = _slab(bounds[1], bounds[4], o[1], d[1], t_lo, t_hi)
    t_lo, t_hi = _slab(bounds[2], bounds[5], o[2], d[2], t_lo, t_hi)
    entry = 0 if t_lo <= t_hi * (F32(1.0) + F32(SLACK)) else DONE
    return entry, t_lo, t_hi


@numba.njit(cache=True, error_model="numpy")
def kd_traverse(nodes_f, nodes_i, refs, leaf_tris, bounds, stack_i, stack_f, ray, t_max, any_hit):
    """One ray's walk: (t, reference, u, v, nodes visited, triangles tested); t = t_max and reference -1
    when nothing lies at 0 < t < t_max (with `any_hit`, the walk stops at the first hit found).

    `stack_i` (STACK_SIZE,) int32 and `stack_f` (STACK_SIZE, 2) float32 are the caller's scratch: the
    pending cells (entry, t_min, t_max), in stack_i[MAILBOX_BASE:] the mailbox and in stack_f's words
    from SCRATCH the slot intervals. `_traverse.closest_hit` / `any_hit` call it with borrowed arrays
    (`_traverse._borrow`). Inside, the arrays are read through their data pointers (`_address`).
    """
    entry, t_lo, t_hi = _root_interval(ray, t_max, bounds)
    (ox, oy, oz), (dx, dy, dz) = ray[0], ray[1]
    ix, iy, iz = F32(1.0) / dx, F32(1.0) / dy, F32(1.0) / dz
    divide = abs(ix) == INF32 or abs(iy) == INF32 or abs(iz) == INF32
    qx, qy, qz = (dx, dy, dz) if divide else (ix, iy, iz)
    n_refs = leaf_tris.shape[0]
    nodes_f, nodes_i, refs, stack_i, stack_f = (_address(nodes_f), _address(nodes_i), _address(refs),
                                                _address(stack_i), _address(stack_f))
    leaf_words = _address(leaf_tris)
    triangles = numba.carray(leaf_words, (n_refs, 9))
    top, t_best, best_k, best_u, best_v, nodes, tested, boxed = 0, t_max, -1, F32(0.0), F32(0.0), 1, 0, 0
    while entry != DONE:
        first_ref, count, duplicated = 0, 0, 0
        if entry >= 0:
            word = entry * RECORD_WORDS
            if nodes_i[word + META_WORD] >= 0:
                bits = _treelet(nodes_f, entry, ox, oy, oz, qx, qy, qz, divide, t_lo, t_hi, stack_f)
                entered = bits & ((1 << SLOTS) - 1)
                if entered != 0:
                    links = word + SLOTS
                    if entered & (entered - 1) == 0:            # one slot: no stack
                        s = bit_count(entered, True)
                        entry = np.int64(nodes_i[links + s])
                        t_lo, t_hi = stack_f[SCRATCH + s], stack_f[SCRATCH + SLOTS + s]
                        nodes += 1
                        continue
                    # Front-to-back rank: the slot index with each level's bit flipped where that
                    # level's plane has d < 0. Push all entered slots by rank, farthest lowest.
                    negative = bits >> SLOTS
                    ranks, ranked = 0, 0
                    rest = entered
                    while rest != 0:
                        s = bit_count(rest, True)
                        rest &= rest - 1
                        flips = 0
                        for level in range(TREELET_LEVELS):
                            position = (1 << level) - 1 + (s >> (TREELET_LEVELS - level))
                            flips |= ((negative >> position) & 1) << (TREELET_LEVELS - 1 - level)
                        rank = s ^ flips
                        ranked |= 1 << rank
                        ranks |= rank << (TREELET_LEVELS * s)
                    rest = entered
                    while rest != 0:
                        s = bit_count(rest, True)
                        rest &= rest - 1
                        rank = (ranks >> (TREELET_LEVELS * s)) & (SLOTS - 1)
                        slot = top + bit_count(ranked >> (rank + 1), False)
                        link = np.int64(nodes_i[links + s])
                        stack_i[slot] = link
                        if link >= 0:                           # its record: two cache lines
                            _prefetch(nodes_i, link * RECORD_WORDS)
                            _prefetch(nodes_i, link * RECORD_WORDS + RECORD_WORDS // 2)
                        else:                                   # its leaf's first triangle
                            _prefetch(leaf_words, ((-2 - link) >> INLINE_SHIFT) * 9)
                        stack_f[2 * slot] = stack_f[SCRATCH + s]
                        stack_f[2 * slot + 1] = stack_f[SCRATCH + SLOTS + s]
                    top += bit_count(entered, False)
            else:                                               # a leaf too big for a link word
                first_ref, count = nodes_i[word + SLOTS], nodes_i[word + SLOTS + 1]
                duplicated = nodes_i[word + SLOTS + 2]
        else:
            code = -2 - entry
            first_ref, count = code >> INLINE_SHIFT, code & ((1 << INLINE_COUNT_BITS) - 1)
            duplicated = (code >> INLINE_COUNT_BITS) & 1
        for k in range(first_ref, first_ref + count):
            if duplicated:
                tri = refs[k]
                seen = False
                for j in range(min(boxed, MAILBOX_SIZE)):
                    if stack_i[MAILBOX_BASE + j] == tri:
                        seen = True
                        break
                if seen:
                    continue
                stack_i[MAILBOX_BASE + (boxed & (MAILBOX_SIZE - 1))] = tri
                boxed += 1
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

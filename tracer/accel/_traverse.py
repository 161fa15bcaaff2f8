"""Traversal kernels: closest hit and any hit through any `Tree`, counting the work done.

Every function returns the number of nodes visited and triangles tested, so the integrator can write the
cost heat maps. `closest_hit` and `any_hit` dispatch on `tree.kind`, so the integrator is compiled once
and traces through a BVH, a kd-tree or no structure at all.

BVH traversal (the 4-wide records of `tracer.accel.bvh`): explicit stack; at a record the four child
boxes are tested at once with the slab test (Kay & Kajiya 1986) as 4-lane vector operations (`_box4`).
The near plane of each axis is picked once per ray from the sign of 1/d (Williams, Barrus, Morley &
Shirley (2005), "An Efficient and Robust Ray-Box Intersection Algorithm", Journal of Graphics Tools
10(1), 49-54), which saves the min/max per slab. The children entered are sorted by entry distance: the
nearest is visited next, the others are pushed farthest first and popped nearest first, skipped once a
closer hit is known (ordered traversal: Wald, Benthin & Boulos (2008), "Getting Rid of Packets", IEEE
Symposium on Interactive Ray Tracing, 1-8; for the binary case e.g. Pharr, Jakob & Humphreys,
"Physically Based Rendering", 3rd ed., section 4.3.4). Any hit tests the same boxes but keeps no order
and stops at the first hit.

Robust slabs: the box test uses the IEEE reciprocal 1/d (inf for a zero component) and min/max that
drop a NaN operand. A zero component then gives the slab no limit when the origin lies inside it or on
one of its planes (0 * inf = NaN, dropped: the closed box contains its faces) and an empty one when the
origin lies outside (Williams et al. 2005, section 3). A plane - origin difference below the smallest
normal float32 counts as 0 (on the plane): the triangle test's products of such subnormal offsets round
to 0, which it takes as a hit on the edge, so the box must not cull that ray (found by hypothesis: an
axis-parallel ray 1.4e-45 beside a triangle's edge).

Counting: a BVH "node visited" is a record processed (its four boxes tested) or a leaf processed (its
triangles tested); a leaf is a lane of its parent's record, so a ray that reaches one leaf through the
root counts 2. A binary BVH (and the C reference `shared/tools/rayref`) counts every inner node and leaf
it processes; the 4-wide tree does the same work in about half as many steps, so its nodes/ray is about
half the binary tree's; triangles tested count the same in both.

`intersect_rays` traces a BVH's rays `STREAM_RAYS` at a time per thread, one traversal step of each in
turn, and prefetches the record or leaf each ray will read next (software prefetch: Mowry, Lam & Gupta
(1992), "Design and Evaluation of a Compiler Algorithm for Prefetching", ASPLOS V, 62-73; interleaving
independent lookups to overlap their cache misses: Chen, Ailamaki, Gibbons & Mowry (2004), "Improving
Hash Join Performance through Prefetching", ICDE, 116-127). A step that misses the cache then waits while
the other rays' steps run, instead of stalling the thread: on the 1M-triangle demo this made incoherent
rays about twice as fast. Each ray still takes exactly the steps it would take alone (same order, same
counts, same hit). Chunks of `RAYS_PER_CHUNK` rays go to whichever thread is free through a shared counter
(`fetch_add`): numba's `prange` under the OpenMP layer splits its range into one equal block per thread
(measured: `set_parallel_chunksize` did not change that), and with rays of uneven cost one thread then
finishes long after the other.
"""
import numba
import numpy as np
from llvmlite import ir
from numba.core import cgutils, types
from numba.extending import intrinsic

from tracer.accel._kdtraverse import bit_count, emit_prefetch, kd_traverse
from tracer.accel._triangle import INF32, hit_triangle, make_ray
from tracer.accel.tree import BVH, KDTREE, STACK_SIZE

F32 = np.float32
U64 = np.uint64
WIDTH = 4                   # lanes of a BVH record (tracer.accel.bvh.WIDTH)
BOX_SLACK = F32(1.0000004)  # t_near <= t_far (1 + 4e-7): flat boxes (a planar leaf) survive rounding
SMALLEST_NORMAL = F32(np.finfo(np.float32).tiny)   # plane - o below this counts as 0 (see the docstring)
RAYS_PER_CHUNK = 256
WORKERS = 64    # prange iterations that pull chunks: at least the thread count (numba.get_num_threads()
                # inside a kernel would stop it from being cached); the surplus find no work and return
STREAM_RAYS = 8             # rays in flight per thread in `intersect_rays` (8 beat 1, 2 and 4 measured)
# Per-ray state of the stream, float32 words ...
S_OX, S_OY, S_OZ, S_IX, S_IY, S_IZ, S_TBEST, S_U, S_V, S_SX, S_SY, S_SZ, S_OKX, S_OKY, S_OKZ = range(15)
# ... and int64 words.
S_NX, S_NY, S_NZ, S_CODE, S_COUNT, S_TOP, S_BEST, S_NODES, S_TRIS, S_RAY, S_KX, S_KY, S_KZ, S_PARALLEL = \
    range(14)


@intrinsic
def fetch_add(typingctx, counter, value):
    """Atomically add `value` to counter[0] (an int64 array) and return the value it had before."""
    if not (isinstance(counter, types.Array) and counter.dtype == types.int64):
        return None
    sig = types.int64(counter, types.int64)

    def codegen(context, builder, signature, args):
        ary = context.make_array(signature.args[0])(context, builder, args[0])
        return builder.atomic_rmw("add", ary.data, args[1], "monotonic")

    return sig, codegen


@intrinsic
def _borrow(typingctx, array):
    """`array` without its reference count: the same data, shape and strides, a null meminfo.

    Reading an array out of the `Tree` tuple makes numba add one to its shared reference count and
    take it off after the call that uses it: two atomic operations per array and ray, on a counter all
    threads share (measured: 100 ns a ray, half the cost of a short traversal). The borrowed view skips
    that. Safe only while the tree outlives the view: pass it down, never store or return it.
    """
    if not isinstance(array, types.Array):
        return None
    sig = array(array)

    def codegen(context, builder, signature, args):
        view = cgutils.create_struct_proxy(signature.args[0])(context, builder, value=args[0])
        view.meminfo = cgutils.get_null_value(view.meminfo.type)
        view.parent = cgutils.get_null_value(view.parent.type)
        return view._getvalue()

    return sig, codegen


@intrinsic
def _fetch(typingctx, nodes_f, leaf_tris, code, count):
    """Hint the CPU to load what the traversal reads next: record `code` (its two cache lines) when
    count is 0, else the `count` triangles from `code` (first, middle and last line). No effect on
    results. An intrinsic rather than a numba function: passing the arrays to an inlined function costs
    two atomic reference-count updates per array and call, which showed as a 2x slower traversal."""
    if not all(isinstance(a, types.Array) and a.ndim == 2 for a in (nodes_f, leaf_tris)):
        return None
    sig = types.void(nodes_f, leaf_tris, types.intp, types.intp)

    def codegen(context, builder, signature, args):
        nodes, tris, code, count = args
        zero = ir.Constant(code.type, 0)

        def hint(aryty, ary_value, row, col):
            ary = context.make_array(aryty)(context, builder, ary_value)
            emit_prefetch(builder, cgutils.get_item_pointer(context, builder, aryty, ary,
                                                            [row, ir.Constant(code.type, col)]))

        with builder.if_else(builder.icmp_signed("==", count, zero)) as (is_record, is_leaf):
            with is_record:
                hint(signature.args[0], nodes, code, 0)
                hint(signature.args[0], nodes, code, 16)
            with is_leaf:
                one = ir.Constant(code.type, 1)
                hint(signature.args[1], tris, code, 0)
                hint(signature.args[1], tris, builder.add(code, builder.ashr(count, one)), 4)
                hint(signature.args[1], tris, builder.sub(builder.add(code, count), one), 8)
        return context.get_dummy_value()

    return sig, codegen


@intrinsic
def _box4(typingctx, nodes_f, n, near_x, near_y, near_z, ox, oy, oz, ix, iy, iz, t_best, parallel):
    """Slab test of the ray against the four boxes of record n, as 4-lane vector operations.

    Returns (mask, t0, t1, t2, t3): bit k of mask is set when lane k's box is entered before t_best,
    and t_k is its entry distance (inf on a miss). near_a is the offset of axis a's near-plane block
    (lo or hi, chosen by the sign of 1/d); the far block is at near_a ^ 4. Per lane it is the scalar
    test t_near = max((near - o) / d, 0), t_far = min((far - o) / d, t_best), hit when
    t_near <= t_far (1 + 4e-7) (the slack keeps flat boxes: a planar leaf); each max/min keeps its
    second operand when the first is NaN (see the module docstring). An unused lane (lo = inf,
    hi = -inf) is missed by every ray. `parallel` (some 1/d infinite) selects the variant that takes
    subnormal plane - o differences as 0 (see the module docstring); it costs 10%, so other rays skip
    it. Built as LLVM vector IR because numba does not run LLVM's SLP vectorizer, so four scalar lanes
    would stay scalar.
    """
    f32 = types.float32
    if not (isinstance(nodes_f, types.Array) and nodes_f.dtype == f32 and nodes_f.ndim == 2):
        return None
    result = types.Tuple((types.int64, f32, f32, f32, f32))
    sig = result(nodes_f, types.intp, types.intp, types.intp, types.intp, f32, f32, f32, f32, f32, f32, f32,
                 types.boolean)

    def codegen(context, builder, signature, args):
        nodes, n, nx, ny, nz, ox, oy, oz, ix, iy, iz, t_best, parallel = args
        ary = context.make_array(signature.args[0])(context, builder, nodes)
        vec, i32 = ir.VectorType(ir.FloatType(), WIDTH), ir.IntType(32)
        fabs = cgutils.get_or_insert_function(builder.module, ir.FunctionType(vec, [vec]), "llvm.fabs.v4f32")
        zero = ir.Constant(vec, [0.0] * WIDTH)
        smallest = ir.Constant(vec, [float(SMALLEST_NORMAL)] * WIDTH)
        four = ir.Constant(n.type, 4)

        def load(col):
            ptr = cgutils.get_item_pointer(context, builder, signature.args[0], ary, [n, col])
            return builder.load(builder.bitcast(ptr, vec.as_pointer()), align=4)

        def splat(x):
            one = builder.insert_element(ir.Constant(vec, ir.Undefined), x, i32(0))
            return builder.shuffle_vector(one, one, ir.Constant(ir.VectorType(i32, WIDTH), [0] * WIDTH))

        def vmax(x, acc):       # x > acc ? x : acc: a NaN x leaves acc
            return builder.select(builder.fcmp_ordered(">", x, acc), x, acc)

        def vmin(x, acc):
            return builder.select(builder.fcmp_ordered("<", x, acc), x, acc)

        def slabs(flush):
            def offset(col, o_v):       # plane - o; with `flush`, a subnormal difference is 0
                diff = builder.fsub(load(col), o_v)
                if not flush:
                    return diff
                small = builder.fcmp_ordered("<", builder.call(fabs, [diff]), smallest)
                return builder.select(small, zero, diff)

            t_near, t_far = zero, splat(t_best)
            for near, o, inv in ((nx, ox, ix), (ny, oy, iy), (nz, oz, iz)):
                o_v, inv_v = splat(o), splat(inv)
                t_near = vmax(builder.fmul(offset(near, o_v), inv_v), t_near)
                t_far = vmin(builder.fmul(offset(builder.xor(near, four), o_v), inv_v), t_far)
            slack = ir.Constant(vec, [float(BOX_SLACK)] * WIDTH)
            hit = builder.fcmp_ordered("<=", t_near, builder.fmul(t_far, slack))
            return hit, builder.select(hit, t_near, ir.Constant(vec, [float("inf")] * WIDTH))

        with builder.if_else(parallel, likely=False) as (robust, plain):
            with robust:
                hit_robust, t_robust = slabs(True)
                robust_end = builder.block
            with plain:
                hit_plain, t_plain = slabs(False)
                plain_end = builder.block
        hit = builder.phi(hit_plain.type)
        hit.add_incoming(hit_robust, robust_end)
        hit.add_incoming(hit_plain, plain_end)
        t_hit = builder.phi(t_plain.type)
        t_hit.add_incoming(t_robust, robust_end)
        t_hit.add_incoming(t_plain, plain_end)
        mask = builder.zext(builder.bitcast(hit, ir.IntType(WIDTH)), ir.IntType(64))
        out = [mask] + [builder.extract_element(t_hit, i32(k)) for k in range(WIDTH)]
        return context.make_tuple(builder, signature.return_type, out)

    return sig, codegen


@numba.njit(cache=True, error_model="numpy", inline="always")
def _slab_setup(ray):
    """IEEE 1/d (inf for a zero component), the near-plane block offset of each axis, and whether some
    1/d is infinite (an axis-parallel ray: `_box4`'s careful variant)."""
    d = ray[1]
    ix, iy, iz = F32(1.0) / d[0], F32(1.0) / d[1], F32(1.0) / d[2]
    near_x = 0 if ix >= F32(0.0) else 4
    near_y = 8 if iy >= F32(0.0) else 12
    near_z = 16 if iz >= F32(0.0) else 20
    parallel = not (abs(ix) < INF32 and abs(iy) < INF32 and abs(iz) < INF32)
    return ix, iy, iz, near_x, near_y, near_z, parallel


@numba.njit(cache=True, error_model="numpy", inline="always")
def _exchange(ta, la, tb, lb):
    """(t, lane) pairs in increasing t (selects, not branches: the order is as good as random)."""
    swap = tb < ta
    return min(ta, tb), (lb if swap else la), max(ta, tb), (la if swap else lb)


@numba.njit(cache=True, error_model="numpy", inline="always")
def _order(t0, t1, t2, t3):
    """Lanes sorted by entry distance (a sorting network; misses are inf and come last)."""
    ta, la, tb, lb = _exchange(t0, 0, t1, 1)
    tc, lc, td, ld = _exchange(t2, 2, t3, 3)
    ta, la, tc, lc = _exchange(ta, la, tc, lc)
    tb, lb, td, ld = _exchange(tb, lb, td, ld)
    tb, lb, tc, lc = _exchange(tb, lb, tc, lc)
    return la, lb, lc, ld, tb, tc, td


@numba.njit(cache=True, error_model="numpy", inline="always")
def _leaf(leaf_tris, first, count, ray, t_best, best_k, best_u, best_v):
    """Test the leaf's triangles; the nearest hit so far, updated without branches."""
    for k in range(first, first + count):
        t, u, v = hit_triangle(leaf_tris, k, ray, t_best)
        closer = t < t_best
        t_best = t if closer else t_best
        best_k = k if closer else best_k
        best_u = u if closer else best_u
        best_v = v if closer else best_v
    return t_best, best_k, best_u, best_v


@numba.njit(cache=True, error_model="numpy")
def _bvh_closest_hit(nodes_f, nodes_i, leaf_tris, stack_i, stack_f, ray, t_max):
    ox, oy, oz = ray[0]
    ix, iy, iz, nx, ny, nz, parallel = _slab_setup(ray)
    t_best, best_k, best_u, best_v = t_max, -1, F32(0.0), F32(0.0)
    nodes, tris = 0, 0
    code, count, top = 0, 0, 0          # current: record `code` (count 0) or leaf of `count` refs at `code`
    while True:
        nodes += 1
        if count == 0:
            mask, t0, t1, t2, t3 = _box4(nodes_f, code, nx, ny, nz, ox, oy, oz, ix, iy, iz, t_best,
                                         parallel)
            if mask != 0:
                n = U64(code)
                if mask & (mask - 1) == 0:      # one child entered: nothing to sort
                    lane = U64(bit_count(mask, True))
                    code, count = nodes_i[n, U64(24) + lane], nodes_i[n, U64(28) + lane]
                else:
                    la, lb, lc, ld, tb, tc, td = _order(t0, t1, t2, t3)
                    entered = bit_count(mask, False)
                    # Push the entered children but the nearest, farthest first; writes past the
                    # entered ones are overwritten later (no branch on how many there are).
                    for lane, t, more in ((ld, td, entered >= 4), (lc, tc, entered >= 3), (lb, tb, True)):
                        slot = U64(top)
                        stack_i[slot] = nodes_i[n, U64(24 + lane)]
                        stack_f[slot, U64(0)] = t
                        stack_f[slot, U64(1)] = F32(nodes_i[n, U64(28 + lane)])
                        top += more
                    code, count = nodes_i[n, U64(24 + la)], nodes_i[n, U64(28 + la)]
                _fetch(nodes_f, leaf_tris, code, count)
                continue
        else:
            tris += count
            t_best, best_k, best_u, best_v = _leaf(leaf_tris, code, count, ray, t_best, best_k, best_u,
                                                   best_v)
        # Pop the nearest pending child that may still hold a closer hit.
        found = False
        while top > 0:
            top -= 1
            slot = U64(top)
            if stack_f[slot, U64(0)] < t_best:
                code, count = stack_i[slot], int(stack_f[slot, U64(1)])
                found = True
                break
        if not found:
            break
        _fetch(nodes_f, leaf_tris, code, count)
    return t_best, best_k, best_u, best_v, nodes, tris


@numba.njit(cache=True, error_model="numpy")
def _bvh_any_hit(nodes_f, nodes_i, leaf_tris, stack_i, stack_f, ray, t_max):
    ox, oy, oz = ray[0]
    ix, iy, iz, nx, ny, nz, parallel = _slab_setup(ray)
    nodes, tris = 0, 0
    code, count, top = 0, 0, 0
    while True:
        nodes += 1
        if count == 0:
            mask, t0, t1, t2, t3 = _box4(nodes_f, code, nx, ny, nz, ox, oy, oz, ix, iy, iz, t_max,
                                         parallel)
            n = U64(code)
            for lane in range(WIDTH):       # push every child entered; the order does not matter here
                slot = U64(top)
                stack_i[slot] = nodes_i[n, U64(24 + lane)]
                stack_f[slot, U64(1)] = F32(nodes_i[n, U64(28 + lane)])
                top += (mask >> lane) & 1
        else:
            for k in range(code, code + count):
                tris += 1
                t, u, v = hit_triangle(leaf_tris, k, ray, t_max)
                if t < t_max:
                    return True, nodes, tris
        if top == 0:
            return False, nodes, tris
        top -= 1
        code, count = stack_i[U64(top)], int(stack_f[U64(top), U64(1)])
        _fetch(nodes_f, leaf_tris, code, count)


@numba.njit(cache=True, error_model="numpy", inline="always")
def _stream_start(nodes_f, leaf_tris, state_f, state_i, j, i, origins, directions, t_max):
    """Put ray i into stream slot j, at the root."""
    ray = make_ray(origins[i, 0], origins[i, 1], origins[i, 2], directions[i, 0], directions[i, 1],
                   directions[i, 2])
    ix, iy, iz, near_x, near_y, near_z, parallel = _slab_setup(ray)
    state_f[j, S_OX], state_f[j, S_OY], state_f[j, S_OZ] = ray[0]
    state_f[j, S_IX], state_f[j, S_IY], state_f[j, S_IZ] = ix, iy, iz
    state_f[j, S_TBEST], state_f[j, S_U], state_f[j, S_V] = t_max[i], F32(0.0), F32(0.0)
    state_f[j, S_SX], state_f[j, S_SY], state_f[j, S_SZ] = ray[6], ray[7], ray[8]
    state_f[j, S_OKX], state_f[j, S_OKY], state_f[j, S_OKZ] = ray[9], ray[10], ray[11]
    state_i[j, S_NX], state_i[j, S_NY], state_i[j, S_NZ] = near_x, near_y, near_z
    state_i[j, S_PARALLEL] = parallel
    state_i[j, S_KX], state_i[j, S_KY], state_i[j, S_KZ] = ray[3], ray[4], ray[5]
    state_i[j, S_CODE], state_i[j, S_COUNT], state_i[j, S_TOP], state_i[j, S_BEST] = 0, 0, 0, -1
    state_i[j, S_NODES], state_i[j, S_TRIS], state_i[j, S_RAY] = 0, 0, i
    _fetch(nodes_f, leaf_tris, 0, 0)


@numba.njit(cache=True, error_model="numpy")
def _bvh_stream(nodes_f, nodes_i, leaf_tris, refs, origins, directions, t_max, next_chunk, out_t,
                out_triangle, out_u, out_v, out_nodes, out_tris):
    """Closest hits of the chunks this thread pulls, STREAM_RAYS rays in flight (see the module docstring).

    Each ray goes through the same steps as in `_bvh_closest_hit`; only the steps of different rays are
    interleaved.
    """
    n_rays = origins.shape[0]
    state_f = np.empty((STREAM_RAYS, 16), np.float32)
    state_i = np.empty((STREAM_RAYS, 16), np.int64)
    stack_code = np.empty((STREAM_RAYS, STACK_SIZE), np.int32)
    stack_count = np.empty((STREAM_RAYS, STACK_SIZE), np.int32)
    stack_t = np.empty((STREAM_RAYS, STACK_SIZE), np.float32)
    next_ray, chunk_end, active = 0, 0, 0
    for j in range(STREAM_RAYS):
        if next_ray == chunk_end:
            next_ray = fetch_add(next_chunk, 1) * RAYS_PER_CHUNK
            chunk_end = min(next_ray + RAYS_PER_CHUNK, n_rays)
        if next_ray < chunk_end:
            _stream_start(nodes_f, leaf_tris, state_f, state_i, j, next_ray, origins, directions, t_max)
            next_ray += 1
            active += 1
        else:
            state_i[j, S_RAY] = -1
    while active > 0:
        for j in range(STREAM_RAYS):
            if state_i[j, S_RAY] < 0:
                continue
            code, count, top = state_i[j, S_CODE], state_i[j, S_COUNT], state_i[j, S_TOP]
            t_best = state_f[j, S_TBEST]
            state_i[j, S_NODES] += 1
            descended = False
            if count == 0:
                mask, t0, t1, t2, t3 = _box4(nodes_f, code, state_i[j, S_NX], state_i[j, S_NY],
                                             state_i[j, S_NZ], state_f[j, S_OX], state_f[j, S_OY],
                                             state_f[j, S_OZ], state_f[j, S_IX], state_f[j, S_IY],
                                             state_f[j, S_IZ], t_best, state_i[j, S_PARALLEL] != 0)
                if mask != 0:
                    descended = True
                    n = U64(code)
                    if mask & (mask - 1) == 0:
                        lane = U64(bit_count(mask, True))
                        code, count = nodes_i[n, U64(24) + lane], nodes_i[n, U64(28) + lane]
                    else:
                        la, lb, lc, ld, tb, tc, td = _order(t0, t1, t2, t3)
                        entered = bit_count(mask, False)
                        for lane, t, more in ((ld, td, entered >= 4), (lc, tc, entered >= 3), (lb, tb, True)):
                            slot = U64(top)
                            stack_code[j, slot] = nodes_i[n, U64(24 + lane)]
                            stack_count[j, slot] = nodes_i[n, U64(28 + lane)]
                            stack_t[j, slot] = t
                            top += more
                        code, count = nodes_i[n, U64(24 + la)], nodes_i[n, U64(28 + la)]
            else:
                # The triangle test reads only the shear terms of the ray tuple (tracer.accel._triangle).
                o = (state_f[j, S_OX], state_f[j, S_OY], state_f[j, S_OZ])
                ray = (o, o, o, U64(state_i[j, S_KX]), U64(state_i[j, S_KY]), U64(state_i[j, S_KZ]),
                       state_f[j, S_SX], state_f[j, S_SY], state_f[j, S_SZ],
                       state_f[j, S_OKX], state_f[j, S_OKY], state_f[j, S_OKZ])
                state_i[j, S_TRIS] += count
                t_best, best_k, best_u, best_v = _leaf(leaf_tris, code, count, ray, t_best,
                                                       state_i[j, S_BEST], state_f[j, S_U], state_f[j, S_V])
                state_f[j, S_TBEST], state_i[j, S_BEST], state_f[j, S_U], state_f[j, S_V] = \
                    t_best, best_k, best_u, best_v
            done = False
            if not descended:
                done = True
                while top > 0:
                    top -= 1
                    if stack_t[j, U64(top)] < t_best:
                        code, count = stack_code[j, U64(top)], stack_count[j, U64(top)]
                        done = False
                        break
            if not done:
                state_i[j, S_CODE], state_i[j, S_COUNT], state_i[j, S_TOP] = code, count, top
                _fetch(nodes_f, leaf_tris, code, count)
                continue
            i = state_i[j, S_RAY]
            best_k = state_i[j, S_BEST]
            out_t[i] = t_best if best_k >= 0 else INF32
            out_triangle[i] = refs[U64(best_k)] if best_k >= 0 else -1
            out_u[i] = state_f[j, S_U]
            out_v[i] = state_f[j, S_V]
            out_nodes[i] = state_i[j, S_NODES]
            out_tris[i] = state_i[j, S_TRIS]
            if next_ray == chunk_end:
                next_ray = fetch_add(next_chunk, 1) * RAYS_PER_CHUNK
                chunk_end = min(next_ray + RAYS_PER_CHUNK, n_rays)
            if next_ray < chunk_end:
                _stream_start(nodes_f, leaf_tris, state_f, state_i, j, next_ray, origins, directions, t_max)
                next_ray += 1
            else:
                state_i[j, S_RAY] = -1
                active -= 1


@numba.njit(cache=True, error_model="numpy")
def _brute_closest_hit(leaf_tris, ray, t_max):
    t_best, best_k, best_u, best_v = t_max, -1, F32(0.0), F32(0.0)
    count = leaf_tris.shape[0]
    for k in range(count):
        t, u, v = hit_triangle(leaf_tris, k, ray, t_best)
        if t < t_best:
            t_best, best_k, best_u, best_v = t, k, u, v
    return t_best, best_k, best_u, best_v, 0, count


@numba.njit(cache=True, error_model="numpy")
def _brute_any_hit(leaf_tris, ray, t_max):
    for k in range(leaf_tris.shape[0]):
        t, u, v = hit_triangle(leaf_tris, k, ray, t_max)
        if t < t_max:
            return True, 0, k + 1
    return False, 0, leaf_tris.shape[0]


@numba.njit(cache=True, error_model="numpy", inline="always")
def closest_hit(tree, stack_i, stack_f, ray, t_max):
    """Nearest hit with 0 < t < t_max: (t, reference, u, v, nodes visited, triangles tested).

    `reference` indexes tree.refs / tree.leaf_tris (-1 and t = t_max on a miss). Inlined into the
    caller, and the BVH and brute kernels get borrowed arrays (`_borrow`): a numba function that takes
    arrays adds to and takes from each one's reference count on every call (measured 60 ns a call).
    """
    if tree.kind == BVH:
        return _bvh_closest_hit(_borrow(tree.nodes_f), _borrow(tree.nodes_i), _borrow(tree.leaf_tris),
                                _borrow(stack_i), _borrow(stack_f), ray, t_max)
    if tree.kind == KDTREE:
        return kd_traverse(_borrow(tree.nodes_f), _borrow(tree.nodes_i), _borrow(tree.refs),
                           _borrow(tree.leaf_tris), _borrow(tree.bounds), _borrow(stack_i), _borrow(stack_f),
                           ray, t_max, False)
    return _brute_closest_hit(_borrow(tree.leaf_tris), ray, t_max)


@numba.njit(cache=True, error_model="numpy", inline="always")
def any_hit(tree, stack_i, stack_f, ray, t_max):
    """Whether anything lies at 0 < t < t_max: (hit, nodes visited, triangles tested); see `closest_hit`."""
    if tree.kind == BVH:
        return _bvh_any_hit(_borrow(tree.nodes_f), _borrow(tree.nodes_i), _borrow(tree.leaf_tris),
                            _borrow(stack_i), _borrow(stack_f), ray, t_max)
    if tree.kind == KDTREE:
        t, k, u, v, nodes, tris = kd_traverse(
            _borrow(tree.nodes_f), _borrow(tree.nodes_i), _borrow(tree.refs), _borrow(tree.leaf_tris),
            _borrow(tree.bounds), _borrow(stack_i), _borrow(stack_f), ray, t_max, True)
        return k >= 0, nodes, tris
    return _brute_any_hit(_borrow(tree.leaf_tris), ray, t_max)


@numba.njit(cache=True, error_model="numpy", parallel=True)
def intersect_rays(tree, origins, directions, t_max, want_closest, stream, out_t, out_triangle, out_u, out_v,
                   out_nodes, out_tris):
    """Trace N rays ((N, 3) float32) in parallel chunks; write the per-ray results into `out_*`.

    With `stream` (what `Accel.intersect` asks), a BVH's closest hits are traced several rays in flight
    (`_bvh_stream`); without it, or for other kinds, one ray after another through `closest_hit` /
    `any_hit`, the integrator's calls (benchmarks/bench_kdtree.py times both paths).

    out_triangle gets the scene triangle id (tree.refs of the reference hit; -1 on a miss), looked up
    here rather than by the caller: a serial gather afterwards cost 6% of a 2-thread call.

    With `want_closest` False only occlusion is asked: out_t is 0 where something lies before t_max.
    """
    n_rays = origins.shape[0]
    n_chunks = (n_rays + RAYS_PER_CHUNK - 1) // RAYS_PER_CHUNK
    next_chunk = np.zeros(1, np.int64)
    if tree.kind == BVH and want_closest and stream:
        for _ in numba.prange(min(WORKERS, n_chunks)):
            _bvh_stream(_borrow(tree.nodes_f), _borrow(tree.nodes_i), _borrow(tree.leaf_tris),
                        _borrow(tree.refs), origins, directions, t_max, next_chunk, out_t, out_triangle,
                        out_u, out_v, out_nodes, out_tris)
        return
    for _ in numba.prange(min(WORKERS, n_chunks)):
        stack_i = np.empty(STACK_SIZE, dtype=np.int32)
        stack_f = np.empty((STACK_SIZE, 2), dtype=np.float32)
        while True:
            chunk = fetch_add(next_chunk, 1)
            if chunk >= n_chunks:
                break
            for i in range(chunk * RAYS_PER_CHUNK, min(n_rays, (chunk + 1) * RAYS_PER_CHUNK)):
                ray = make_ray(origins[i, 0], origins[i, 1], origins[i, 2],
                               directions[i, 0], directions[i, 1], directions[i, 2])
                if want_closest:
                    t, k, u, v, nodes, tris = closest_hit(tree, stack_i, stack_f, ray, t_max[i])
                    out_t[i] = t if k >= 0 else INF32
                    out_triangle[i] = tree.refs[k] if k >= 0 else -1
                    out_u[i] = u
                    out_v[i] = v
                else:
                    hit, nodes, tris = any_hit(tree, stack_i, stack_f, ray, t_max[i])
                    out_t[i] = F32(0.0) if hit else INF32
                    out_triangle[i] = -1
                out_nodes[i] = nodes
                out_tris[i] = tris

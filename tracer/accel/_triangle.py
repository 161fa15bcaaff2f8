"""Ray set-up and the watertight ray/triangle test.

Woop, Benthin & Wald (2013), "Watertight Ray/Triangle Intersection", Journal of Computer Graphics
Techniques 2(1), 65-82. The ray is sheared so it runs along +Z; each edge function is then evaluated in
2D, and an edge function that is exactly 0 is recomputed in float64 (section 3), so a ray through a shared
edge or vertex of a closed mesh hits at least one of the triangles that share it.

A ray is the tuple made by `make_ray`: origin, direction, 1/direction (for the slab test), the shear
axes (kx, ky, kz), the shear constants (sx, sy, sz) and the origin permuted by the shear axes, all
float32 except the axes.
"""
import numba
import numpy as np

F32 = np.float32
U64 = np.uint64
INF32 = np.float32(np.inf)


TINY = np.float32(1e-35)


@numba.njit(cache=True, error_model="numpy", inline="always")
def _safe_inverse(x):
    """1/x with |x| raised to at least 1e-35 (sign kept, -0 counts as negative).

    An axis-parallel ray then gets a huge finite 1/d instead of inf, so an origin lying exactly on a
    slab plane gives 0 * 1e35 = 0 rather than 0 * inf = NaN. (The BVH box test and the kd-tree walk
    take the IEEE 1/d instead and handle its infinities themselves: `tracer.accel._traverse`,
    `tracer.accel._kdtraverse`.)
    """
    if abs(x) >= TINY:
        return F32(1.0) / x
    return -F32(1.0) / TINY if np.signbit(x) else F32(1.0) / TINY


@numba.njit(cache=True, error_model="numpy", inline="always")
def make_ray(ox, oy, oz, dx, dy, dz):
    """Precompute what the slab and triangle tests need for the ray o + t d (float32 in and out).

    The tuple: origin, direction, 1/direction (each a 3-tuple), the shear axes kx, ky, kz (uint64, so
    that indexing with them needs no negative-index check), the shear constants sx, sy, sz, and the
    origin's kx, ky, kz components (so the triangle test indexes no tuple at run time).
    """
    o = (F32(ox), F32(oy), F32(oz))
    d = (F32(dx), F32(dy), F32(dz))
    inv = (_safe_inverse(d[0]), _safe_inverse(d[1]), _safe_inverse(d[2]))
    ax, ay, az = abs(d[0]), abs(d[1]), abs(d[2])
    # Woop et al. 2013, Listing 1: kz is the dominant axis; swap kx, ky to keep the winding.
    if ax >= ay and ax >= az:
        kz = 0
    elif ay >= az:
        kz = 1
    else:
        kz = 2
    kx = kz + 1 if kz < 2 else 0
    ky = kx + 1 if kx < 2 else 0
    if d[kz] < F32(0.0):
        kx, ky = ky, kx
    sz = F32(1.0) / d[kz]
    sx = d[kx] * sz
    sy = d[ky] * sz
    return o, d, inv, U64(kx), U64(ky), U64(kz), sx, sy, sz, o[kx], o[ky], o[kz]


@numba.njit(cache=True, error_model="numpy", inline="always")
def hit_triangle(leaf_tris, k, ray, t_best):
    """Test reference k of `leaf_tris` (R, 9) against `ray`; two-sided.

    Returns (t, u, v): the hit distance, 0 < t < t_best, and the barycentric weights of v1 and v2;
    t = inf when there is no such hit. The decisions are combined without branches (they are as good
    as random from one triangle to the next, and mispredicted branches cost more than the arithmetic).
    Only ray[3:12] (the shear terms) are read; the BVH ray stream relies on that.
    """
    kx, ky, kz, sx, sy, sz, okx, oky, okz = ray[3], ray[4], ray[5], ray[6], ray[7], ray[8], ray[9], ray[10], \
        ray[11]
    r = U64(k)
    # Vertices relative to the origin (Woop et al. 2013, Listing 2).
    ax_ = leaf_tris[r, kx] - okx
    ay_ = leaf_tris[r, ky] - oky
    az_ = leaf_tris[r, kz] - okz
    bx_ = leaf_tris[r, U64(3) + kx] - okx
    by_ = leaf_tris[r, U64(3) + ky] - oky
    bz_ = leaf_tris[r, U64(3) + kz] - okz
    cx_ = leaf_tris[r, U64(6) + kx] - okx
    cy_ = leaf_tris[r, U64(6) + ky] - oky
    cz_ = leaf_tris[r, U64(6) + kz] - okz
    # Shear and scale.
    ax = ax_ - sx * az_
    ay = ay_ - sy * az_
    bx = bx_ - sx * bz_
    by = by_ - sy * bz_
    cx = cx_ - sx * cz_
    cy = cy_ - sy * cz_
    # Scaled barycentric coordinates (edge functions).
    u_ = cx * by - cy * bx
    v_ = ax * cy - ay * cx
    w_ = bx * ay - by * ax
    zero = F32(0.0)
    if (u_ == zero) | (v_ == zero) | (w_ == zero):
        # Section 3: fall back to float64 on an exact zero, so shared edges are decided consistently.
        u_ = F32(np.float64(cx) * np.float64(by) - np.float64(cy) * np.float64(bx))
        v_ = F32(np.float64(ax) * np.float64(cy) - np.float64(ay) * np.float64(cx))
        w_ = F32(np.float64(bx) * np.float64(ay) - np.float64(by) * np.float64(ax))
    outside = ((u_ < zero) | (v_ < zero) | (w_ < zero)) & ((u_ > zero) | (v_ > zero) | (w_ > zero))
    det = u_ + v_ + w_
    az = sz * az_
    bz = sz * bz_
    cz = sz * cz_
    t_scaled = u_ * az + v_ * bz + w_ * cz
    # Depth test without a division: 0 < T/det < t_best, for either sign of det (two-sided).
    front = det > zero
    t_signed = t_scaled if front else -t_scaled
    det_abs = det if front else -det
    inside = (not outside) & (det != zero) & (t_signed > zero) & (t_signed < t_best * det_abs)
    inv_det = F32(1.0) / det
    # u_ weighs v0, v_ weighs v1, w_ weighs v2.
    return (t_scaled * inv_det if inside else INF32), v_ * inv_det, w_ * inv_det

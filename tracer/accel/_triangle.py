"""Ray set-up and the watertight ray/triangle test.

Woop, Benthin & Wald (2013), "Watertight Ray/Triangle Intersection", Journal of Computer Graphics
Techniques 2(1), 65-82. The ray is sheared so it runs along +Z; each edge function is then evaluated in
2D, and an edge function that is exactly 0 is recomputed in float64 (section 3), so a ray through a shared
edge or vertex of a closed mesh hits at least one of the triangles that share it.

A ray is the tuple made by `make_ray`: origin, direction, 1/direction (for the slab test), the shear
axes (kx, ky, kz) and shear constants (sx, sy, sz), all float32 except the axes.
"""
import numba
import numpy as np

F32 = np.float32
INF32 = np.float32(np.inf)


TINY = np.float32(1e-35)


@numba.njit(cache=True, error_model="numpy", inline="always")
def _safe_inverse(x):
    """1/x with |x| raised to at least 1e-35 (sign kept, -0 counts as negative).

    An axis-parallel ray then gets a huge finite 1/d instead of inf, so an origin lying exactly on a
    slab plane gives 0 * 1e35 = 0 rather than 0 * inf = NaN, and the slab test stays decided.
    """
    if abs(x) >= TINY:
        return F32(1.0) / x
    return -F32(1.0) / TINY if np.signbit(x) else F32(1.0) / TINY


@numba.njit(cache=True, error_model="numpy", inline="always")
def make_ray(ox, oy, oz, dx, dy, dz):
    """Precompute what the slab and triangle tests need for the ray o + t d (float32 in and out)."""
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
    return o, d, inv, kx, ky, kz, sx, sy, sz


@numba.njit(cache=True, error_model="numpy", inline="always")
def hit_triangle(leaf_tris, k, ray, t_best):
    """Test reference k of `leaf_tris` (R, 9) against `ray`; two-sided.

    Returns (t, u, v): the hit distance, 0 < t < t_best, and the barycentric weights of v1 and v2;
    t = inf when there is no such hit.
    """
    o, d, inv, kx, ky, kz, sx, sy, sz = ray
    tri = leaf_tris[k]
    # Vertices relative to the origin (Woop et al. 2013, Listing 2).
    ax_ = tri[kx] - o[kx]
    ay_ = tri[ky] - o[ky]
    az_ = tri[kz] - o[kz]
    bx_ = tri[3 + kx] - o[kx]
    by_ = tri[3 + ky] - o[ky]
    bz_ = tri[3 + kz] - o[kz]
    cx_ = tri[6 + kx] - o[kx]
    cy_ = tri[6 + ky] - o[ky]
    cz_ = tri[6 + kz] - o[kz]
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
    if u_ == F32(0.0) or v_ == F32(0.0) or w_ == F32(0.0):
        # Section 3: fall back to float64 on an exact zero, so shared edges are decided consistently.
        u_ = F32(np.float64(cx) * np.float64(by) - np.float64(cy) * np.float64(bx))
        v_ = F32(np.float64(ax) * np.float64(cy) - np.float64(ay) * np.float64(cx))
        w_ = F32(np.float64(bx) * np.float64(ay) - np.float64(by) * np.float64(ax))
    zero = F32(0.0)
    if (u_ < zero or v_ < zero or w_ < zero) and (u_ > zero or v_ > zero or w_ > zero):
        return INF32, zero, zero
    det = u_ + v_ + w_
    if det == zero:
        return INF32, zero, zero
    az = sz * az_
    bz = sz * bz_
    cz = sz * cz_
    t_scaled = u_ * az + v_ * bz + w_ * cz
    # Depth test without a division: 0 < T/det < t_best (both signs of det: two-sided).
    if det > zero:
        if t_scaled <= zero or t_scaled >= t_best * det:
            return INF32, zero, zero
    else:
        if t_scaled >= zero or t_scaled <= t_best * det:
            return INF32, zero, zero
    inv_det = F32(1.0) / det
    # u_ weighs v0, v_ weighs v1, w_ weighs v2.
    return t_scaled * inv_det, v_ * inv_det, w_ * inv_det


@numba.njit(cache=True, error_model="numpy", inline="always")
def hit_box(nodes_f, n, ray, t_best):
    """Slab test (Kay & Kajiya 1986) of node n's box [f0:3, f3:6]; returns the entry distance or inf.

    Robust to zero direction components: `make_ray` gives them a huge finite 1/d, so that slab becomes
    (-huge, huge) or empty and no 0 * inf = NaN can occur.
    """
    o, d, inv, kx, ky, kz, sx, sy, sz = ray
    box = nodes_f[n]
    t0x = (box[0] - o[0]) * inv[0]
    t1x = (box[3] - o[0]) * inv[0]
    t0y = (box[1] - o[1]) * inv[1]
    t1y = (box[4] - o[1]) * inv[1]
    t0z = (box[2] - o[2]) * inv[2]
    t1z = (box[5] - o[2]) * inv[2]
    tnear = max(min(t0x, t1x), min(t0y, t1y), min(t0z, t1z), F32(0.0))
    tfar = min(max(t0x, t1x), max(t0y, t1y), max(t0z, t1z), t_best)
    # A tiny relative slack keeps flat boxes (a planar leaf) from being missed by rounding.
    if tnear <= tfar * F32(1.0000004):
        return tnear
    return INF32

"""The path-tracing kernel: one sample for every pixel of a band of rows, written into a pass buffer.

Unidirectional path tracing (Kajiya 1986, "The rendering equation", SIGGRAPH '86). At every non-delta
surface interaction the path samples the lights: one point on one emissive triangle, the triangle chosen
with probability proportional to area x emitted power and the point uniform on it (Shirley, Wang &
Zimmerman 1996, "Monte Carlo techniques for direct lighting calculations", ACM TOG 15(1)), and, when
the environment is not black, one direction of the uniform environment, cosine-distributed about the
normal (its exact importance for a Lambertian surface). Light sampling and BSDF sampling are combined
by multiple importance sampling with the power heuristic, beta = 2 (Veach & Guibas 1995, "Optimally
combining sampling techniques for Monte Carlo rendering", SIGGRAPH '95, section 3). Delta lobes (mirror,
glass) skip light sampling and see emitters with weight 1. Russian roulette (Arvo & Kirk 1990,
"Particle transport and image synthesis", SIGGRAPH '90) from the fourth surface interaction on.

Random numbers are Owen-scrambled Sobol' points per (seed, pixel, sample) in 4D groups
(`tracer.render.rng`), so the image does not depend on the thread count. The pixel filter is a box of
one pixel: the sample position is uniform over the pixel's square. Every ray goes through
`tracer.accel._traverse`, whose counters feed the cost channels and the per-ray histograms.
"""
import math

import numba
import numpy as np

from tracer.accel._traverse import WORKERS, any_hit, closest_hit, fetch_add
from tracer.accel._triangle import INF32, make_ray
from tracer.accel.tree import STACK_SIZE
from tracer.render._bsdf import (
    ROUGHNESS_DELTA,
    cosine_hemisphere,
    fresnel_dielectric,
    metal_eval,
    metal_sample,
)
from tracer.render.camera import camera_ray
from tracer.render.rng import pixel_key, scrambled_sobol4
from tracer.scene.types import (
    EMITTER,
    GLASS,
    M_COLOR,
    M_EMISSION,
    M_IOR,
    M_KIND,
    M_ROUGHNESS,
    M_TWO_SIDED,
    METAL,
)

# Channels of the pass buffer (per pixel, one sample).
CH_RGB, CH_COST_NODES, CH_COST_TRIS, CH_PRIMARY_NODES, CH_PRIMARY_TRIS = 0, 3, 4, 5, 6
CH_ALBEDO, CH_NORMAL, CH_DEPTH = 7, 10, 13
N_CHANNELS = 14
# Per-thread counters.
K_RAYS, K_CAMERA, K_SHADOW, K_MAX_NODES, K_MAX_TRIS, K_NONFINITE = 0, 1, 2, 3, 4, 5
N_COUNTERS = 8
# Per-ray cost histogram: exact bins below 256, then 32 bins per octave (relative width 2.2%).
HIST_EXACT = 256
HIST_PER_OCTAVE = 32
HIST_BINS = HIST_EXACT + HIST_PER_OCTAVE * 24
GROUPS_PER_BOUNCE = 3       # 4D random groups per path vertex: lights + roulette, BSDF, environment
ROULETTE_DEPTH = 3
FLOAT32_MAX = float(np.finfo(np.float32).max)
OFFSET_SCALE = 1e-5         # ray origins move this much (x max(1, |p|)) off the surface (common practice)


@numba.njit(cache=True, error_model="numpy", inline="always")
def _cost_bin(count):
    if count < HIST_EXACT:
        return count
    b = HIST_EXACT + int(HIST_PER_OCTAVE * math.log2(count / HIST_EXACT))
    return min(b, HIST_BINS - 1)


@numba.njit(cache=True, error_model="numpy", inline="always")
def _record_ray(hist, counters, tid, nodes, tris):
    hist[tid, 0, _cost_bin(nodes)] += 1
    hist[tid, 1, _cost_bin(tris)] += 1
    counters[tid, K_RAYS] += 1
    counters[tid, K_MAX_NODES] = max(counters[tid, K_MAX_NODES], nodes)
    counters[tid, K_MAX_TRIS] = max(counters[tid, K_MAX_TRIS], tris)


@numba.njit(cache=True, error_model="numpy", inline="always")
def _basis(nx, ny, nz):
    """Two unit vectors completing n to an orthonormal basis (Duff et al. 2017, JCGT 6(1), Listing 3)."""
    sign = 1.0 if nz >= 0.0 else -1.0
    a = -1.0 / (sign + nz)
    b = nx * ny * a
    return (1.0 + sign * nx * nx * a, sign * b, -sign * nx), (b, sign + ny * ny * a, -ny)


@numba.njit(cache=True, error_model="numpy", inline="always")
def _clamped(r, g, b, limit):
    """Scale (r, g, b) so its largest channel is at most `limit` (0 = no limit). Biased, opt-in."""
    m = max(r, g, b)
    if limit > 0.0 and m > limit:
        s = limit / m
        return r * s, g * s, b * s
    return r, g, b


@numba.njit(cache=True, error_model="numpy", inline="always")
def _power_heuristic(pdf_a, pdf_b):
    """Veach & Guibas 1995, eq. (9) with beta = 2: the weight of strategy a."""
    a2, b2 = pdf_a * pdf_a, pdf_b * pdf_b
    return a2 / (a2 + b2) if a2 > 0.0 else 0.0


@numba.njit(cache=True, error_model="numpy")
def _bsdf_eval(kind, mat, ox, oy, oz, ix, iy, iz):
    """f * cos (r, g, b) and the BSDF-sampling pdf of direction i, in the local frame (non-delta only)."""
    if kind == METAL:
        alpha = mat[M_ROUGHNESS] * mat[M_ROUGHNESS]        # GGX alpha = roughness^2 (INTERFACE.md)
        return metal_eval(alpha, mat[M_COLOR], mat[M_COLOR + 1], mat[M_COLOR + 2], ox, oy, oz, ix, iy, iz)
    if iz <= 0.0:
        return 0.0, 0.0, 0.0, 0.0
    f = iz / math.pi                                         # Lambertian: albedo / pi * cos
    return mat[M_COLOR] * f, mat[M_COLOR + 1] * f, mat[M_COLOR + 2] * f, f


@numba.njit(cache=True, error_model="numpy")
def _shadow(tree, stack_i, stack_f, hist, counters, tid, sx, sy, sz, wx, wy, wz, t_max):
    """Any-hit ray for light sampling; returns (blocked, nodes, tris) and tallies it."""
    ray = make_ray(sx, sy, sz, wx, wy, wz)
    blocked, nodes, tris = any_hit(tree, stack_i, stack_f, ray, np.float32(t_max))
    _record_ray(hist, counters, tid, nodes, tris)
    counters[tid, K_SHADOW] += 1
    return blocked, nodes, tris


@numba.njit(cache=True, error_model="numpy")
def _trace_path(tree, geo, cam, width, height, row, col, key, sample, max_bounces, clamp, stack_i, stack_f,
                hist, counters, tid, out):
    """One path through pixel (row, col); writes its channels into out[0:N_CHANNELS]."""
    pk = pixel_key(key, row * width + col)
    c0, c1, c2, c3 = scrambled_sobol4(pk, sample, 0)
    ox, oy, oz, dx, dy, dz = camera_ray(cam, width, height, row, col, c0, c1, c2, c3)
    env_r, env_g, env_b = geo.environment[0], geo.environment[1], geo.environment[2]
    sample_env = max(env_r, env_g, env_b) > 0.0
    n_lights = geo.emit_tris.shape[0]
    lr, lg, lb = 0.0, 0.0, 0.0            # radiance gathered
    tr, tg, tb = 1.0, 1.0, 1.0            # path throughput
    nodes_sum, tris_sum = 0, 0
    prev_pdf = 0.0                        # BSDF pdf of the ray being traced; 0 = camera ray or delta lobe
    pnx, pny, pnz = 0.0, 0.0, 0.0         # normal at the previous vertex (environment sampling pdf)
    for c in range(CH_ALBEDO, CH_DEPTH):
        out[c] = 0.0
    out[CH_DEPTH] = np.inf
    for depth in range(max_bounces + 1):
        t, k, u, v, nodes, tris = closest_hit(tree, stack_i, stack_f, make_ray(ox, oy, oz, dx, dy, dz), INF32)
        nodes_sum += nodes
        tris_sum += tris
        _record_ray(hist, counters, tid, nodes, tris)
        if depth == 0:
            counters[tid, K_CAMERA] += 1
            out[CH_PRIMARY_NODES] = nodes
            out[CH_PRIMARY_TRIS] = tris
        limit = clamp if depth >= 2 else 0.0          # --clamp acts on indirect light only
        if k < 0:
            w = 1.0
            if prev_pdf > 0.0 and sample_env:
                w = _power_heuristic(prev_pdf, max(0.0, dx * pnx + dy * pny + dz * pnz) / math.pi)
            er, eg, eb = _clamped(tr * env_r * w, tg * env_g * w, tb * env_b * w, limit)
            lr, lg, lb = lr + er, lg + eg, lb + eb
            break
        tri = tree.refs[k]
        mat = geo.material_params[geo.material_of[tri]]
        nx, ny, nz = geo.tri_normal[tri, 0], geo.tri_normal[tri, 1], geo.tri_normal[tri, 2]
        cos_hit = -(dx * nx + dy * ny + dz * nz)
        front = cos_hit > 0.0
        kind = int(mat[M_KIND])
        if depth == 0:
            if kind == EMITTER:
                out[CH_ALBEDO], out[CH_ALBEDO + 1], out[CH_ALBEDO + 2] = 0.0, 0.0, 0.0
            elif kind == GLASS:
                out[CH_ALBEDO], out[CH_ALBEDO + 1], out[CH_ALBEDO + 2] = 1.0, 1.0, 1.0
            else:
                for c in range(3):
                    out[CH_ALBEDO + c] = mat[M_COLOR + c]
            out[CH_NORMAL], out[CH_NORMAL + 1], out[CH_NORMAL + 2] = nx, ny, nz
            out[CH_DEPTH] = t
        if front or mat[M_TWO_SIDED] > 0.5:
            w = 1.0
            if prev_pdf > 0.0:
                light_pdf = geo.tri_light_pdf[tri] * t * t / abs(cos_hit)
                w = _power_heuristic(prev_pdf, light_pdf)
            er, eg, eb = _clamped(tr * mat[M_EMISSION] * w, tg * mat[M_EMISSION + 1] * w,
                                  tb * mat[M_EMISSION + 2] * w, limit)
            lr, lg, lb = lr + er, lg + eg, lb + eb
        if depth == max_bounces or kind == EMITTER:
            break
        # Hit point from the barycentrics, on the triangle's plane; the frame's z turned to the viewer.
        tv = tree.leaf_tris[k]
        w0 = 1.0 - np.float64(u) - np.float64(v)
        px = w0 * tv[0] + u * np.float64(tv[3]) + v * np.float64(tv[6])
        py = w0 * tv[1] + u * np.float64(tv[4]) + v * np.float64(tv[7])
        pz = w0 * tv[2] + u * np.float64(tv[5]) + v * np.float64(tv[8])
        if not front:
            nx, ny, nz = -nx, -ny, -nz
        eps = OFFSET_SCALE * max(1.0, abs(px), abs(py), abs(pz))
        sx, sy, sz = px + eps * nx, py + eps * ny, pz + eps * nz
        b1, b2 = _basis(nx, ny, nz)
        wox = -(dx * b1[0] + dy * b1[1] + dz * b1[2])
        woy = -(dx * b2[0] + dy * b2[1] + dz * b2[2])
        woz = max(cos_hit if front else -cos_hit, 1e-9)
        limit = clamp if depth >= 1 else 0.0
        g_light = scrambled_sobol4(pk, sample, 1 + GROUPS_PER_BOUNCE * depth)
        g_bsdf = scrambled_sobol4(pk, sample, 2 + GROUPS_PER_BOUNCE * depth)
        delta = kind == GLASS or (kind == METAL and mat[M_ROUGHNESS] < ROUGHNESS_DELTA)
        if not delta and n_lights > 0:
            # Light sampling: one point on one emissive triangle, MIS-weighted against BSDF sampling.
            j = min(np.searchsorted(geo.emit_cdf, g_light[0], side="right"), n_lights - 1)
            s = math.sqrt(g_light[1])
            ev = geo.emit_vertices[j]
            a0, a1, a2 = 1.0 - s, s * (1.0 - g_light[2]), s * g_light[2]   # uniform on the triangle
            qx = a0 * ev[0] + a1 * ev[3] + a2 * ev[6]
            qy = a0 * ev[1] + a1 * ev[4] + a2 * ev[7]
            qz = a0 * ev[2] + a1 * ev[5] + a2 * ev[8]
            wx, wy, wz = qx - sx, qy - sy, qz - sz
            dist2 = wx * wx + wy * wy + wz * wz
            if dist2 > 0.0:
                dist = math.sqrt(dist2)
                wx, wy, wz = wx / dist, wy / dist, wz / dist
                light_tri = geo.emit_tris[j]
                lmat = geo.material_params[geo.material_of[light_tri]]
                cos_l = -(wx * geo.tri_normal[light_tri, 0] + wy * geo.tri_normal[light_tri, 1]
                          + wz * geo.tri_normal[light_tri, 2])
                if lmat[M_TWO_SIDED] > 0.5:
                    cos_l = abs(cos_l)
                ix = wx * b1[0] + wy * b1[1] + wz * b1[2]
                iy = wx * b2[0] + wy * b2[1] + wz * b2[2]
                iz = wx * nx + wy * ny + wz * nz
                if cos_l > 0.0 and iz > 0.0:
                    fr, fg, fb, bsdf_pdf = _bsdf_eval(kind, mat, wox, woy, woz, ix, iy, iz)
                    if max(fr, fg, fb) > 0.0:
                        eps_l = OFFSET_SCALE * max(1.0, abs(qx), abs(qy), abs(qz))
                        blocked, nodes, tris = _shadow(tree, stack_i, stack_f, hist, counters, tid,
                                                       sx, sy, sz, wx, wy, wz, dist - 2.0 * eps_l)
                        nodes_sum += nodes
                        tris_sum += tris
                        if not blocked:
                            light_pdf = geo.emit_pdf_area[j] * dist2 / cos_l      # area -> solid angle
                            w = _power_heuristic(light_pdf, bsdf_pdf) / light_pdf
                            er, eg, eb = _clamped(tr * fr * lmat[M_EMISSION] * w,
                                                  tg * fg * lmat[M_EMISSION + 1] * w,
                                                  tb * fb * lmat[M_EMISSION + 2] * w, limit)
                            lr, lg, lb = lr + er, lg + eg, lb + eb
        if not delta and sample_env:
            # Environment sampling: cosine-distributed about the normal, pdf = cos / pi.
            g_env = scrambled_sobol4(pk, sample, 3 + GROUPS_PER_BOUNCE * depth)
            ix, iy, iz = cosine_hemisphere(g_env[0], g_env[1])
            fr, fg, fb, bsdf_pdf = _bsdf_eval(kind, mat, wox, woy, woz, ix, iy, iz)
            if max(fr, fg, fb) > 0.0:
                wx = ix * b1[0] + iy * b2[0] + iz * nx
                wy = ix * b1[1] + iy * b2[1] + iz * ny
                wz = ix * b1[2] + iy * b2[2] + iz * nz
                blocked, nodes, tris = _shadow(tree, stack_i, stack_f, hist, counters, tid, sx, sy, sz,
                                               wx, wy, wz, np.inf)
                nodes_sum += nodes
                tris_sum += tris
                if not blocked:
                    env_pdf = iz / math.pi
                    w = _power_heuristic(env_pdf, bsdf_pdf) / env_pdf
                    er, eg, eb = _clamped(tr * fr * env_r * w, tg * fg * env_g * w, tb * fb * env_b * w,
                                          limit)
                    lr, lg, lb = lr + er, lg + eg, lb + eb
        # BSDF sampling: the next direction, its weight f cos / pdf and pdf (0 for a delta lobe).
        transmit = False
        if kind == METAL:
            alpha = mat[M_ROUGHNESS] * mat[M_ROUGHNESS]
            ix, iy, iz, wr, wg, wb, pdf = metal_sample(alpha, mat[M_COLOR], mat[M_COLOR + 1],
                                                       mat[M_COLOR + 2], wox, woy, woz, g_bsdf[0], g_bsdf[1])
        elif kind == GLASS:
            eta = mat[M_IOR] if front else 1.0 / mat[M_IOR]      # n_transmitted / n_incident
            reflectance, cos_t = fresnel_dielectric(woz, eta)
            pdf = 0.0
            if g_bsdf[2] < reflectance:                           # choose by Fresnel probability
                ix, iy, iz, wr, wg, wb = -wox, -woy, woz, 1.0, 1.0, 1.0
            else:
                # Snell refraction; radiance is scaled by (n_i / n_t)^2 across the interface.
                ix, iy, iz = -wox / eta, -woy / eta, -cos_t
                scale = 1.0 / (eta * eta)
                wr, wg, wb = scale, scale, scale
                transmit = True
        else:
            ix, iy, iz = cosine_hemisphere(g_bsdf[0], g_bsdf[1])
            wr, wg, wb, pdf = mat[M_COLOR], mat[M_COLOR + 1], mat[M_COLOR + 2], iz / math.pi
        if max(wr, wg, wb) <= 0.0:
            break
        dx = ix * b1[0] + iy * b2[0] + iz * nx
        dy = ix * b1[1] + iy * b2[1] + iz * ny
        dz = ix * b1[2] + iy * b2[2] + iz * nz
        norm = 1.0 / math.sqrt(dx * dx + dy * dy + dz * dz)
        dx, dy, dz = dx * norm, dy * norm, dz * norm
        if transmit:
            ox, oy, oz = px - eps * nx, py - eps * ny, pz - eps * nz
        else:
            ox, oy, oz = sx, sy, sz
        tr, tg, tb = tr * wr, tg * wg, tb * wb
        prev_pdf = pdf
        pnx, pny, pnz = nx, ny, nz
        if depth >= ROULETTE_DEPTH:
            survive = min(max(tr, tg, tb), 0.95)
            if survive <= 0.0 or g_light[3] >= survive:
                break
            tr, tg, tb = tr / survive, tg / survive, tb / survive
    # The pass buffer is float32: a sum beyond its range would turn into inf on the way in.
    if abs(lr) <= FLOAT32_MAX and abs(lg) <= FLOAT32_MAX and abs(lb) <= FLOAT32_MAX:   # NaN fails too
        out[0], out[1], out[2] = lr, lg, lb
    else:                                  # never let one bad sample poison the image
        out[0], out[1], out[2] = 0.0, 0.0, 0.0
        counters[tid, K_NONFINITE] += 1
    out[CH_COST_NODES] = nodes_sum
    out[CH_COST_TRIS] = tris_sum


@numba.njit(cache=True, error_model="numpy", parallel=True)
def render_rows(tree, geo, cam, width, height, row0, row1, key, sample, max_bounces, clamp, out, hist,
                counters):
    """Trace sample `sample` of every pixel in rows [row0, row1) into out[row, col, :]; per-ray cost
    histograms and counters go to hist/counters[thread].

    Rows go one at a time to whichever thread is free, through a shared counter (`fetch_add`):
    `prange` under the OpenMP layer would give each thread one equal block of rows whatever the chunk
    size, and rows of sky cost a fraction of rows of ground (the 1M-triangle demo scaled 1.61x on two
    threads that way). A pixel's value depends only on (key, pixel, sample), not on the thread.
    """
    next_row = np.zeros(1, np.int64)
    for _ in numba.prange(min(WORKERS, row1 - row0)):
        tid = numba.get_thread_id()
        stack_i = np.empty(STACK_SIZE, dtype=np.int32)
        stack_f = np.empty((STACK_SIZE, 2), dtype=np.float32)
        while True:
            row = row0 + fetch_add(next_row, 1)
            if row >= row1:
                break
            for col in range(width):
                _trace_path(tree, geo, cam, width, height, row, col, key, sample, max_bounces, clamp,
                            stack_i, stack_f, hist, counters, tid, out[row, col])

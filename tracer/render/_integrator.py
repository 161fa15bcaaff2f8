"""The path-tracing kernel: one sample for every pixel of a band of rows, written into a pass buffer.

Unidirectional path tracing (Kajiya 1986, "The rendering equation", SIGGRAPH '86) with next-event
estimation on emissive triangles: a triangle is chosen with probability proportional to area x emitted
power and a uniform point on it (Shirley, Wang & Zimmerman 1996, "Monte Carlo techniques for direct
lighting calculations", ACM TOG 15(1)); emission reached by a diffuse bounce is then not counted again.
The uniform environment is reached by escaping rays. Russian roulette (Arvo & Kirk 1990, "Particle
transport and image synthesis", SIGGRAPH '90) from the fourth surface interaction on.

Every ray goes through `tracer.accel._traverse`, whose counters feed the cost channels and the per-ray
histograms. Random numbers come from `tracer.render.rng`, keyed by (seed, pixel, sample), so the
result does not depend on the thread count.
"""
import math

import numba
import numpy as np

from tracer.accel._traverse import any_hit, closest_hit
from tracer.accel._triangle import INF32, make_ray
from tracer.accel.tree import STACK_SIZE
from tracer.render.camera import camera_ray
from tracer.render.rng import path_key, uniform
from tracer.scene.types import (
    EMITTER,
    GLASS,
    M_COLOR,
    M_EMISSION,
    M_KIND,
    M_TWO_SIDED,
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
DIMS_PER_BOUNCE = 8         # random dimensions used per path vertex (light choice, point, bsdf, roulette)
ROULETTE_DEPTH = 3
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


@numba.njit(cache=True, error_model="numpy")
def _trace_path(tree, geo, cam, width, height, row, col, key, sample, max_bounces, stack_i, stack_f,
                hist, counters, tid, out):
    """One path through pixel (row, col); writes its channels into out[0:N_CHANNELS]."""
    pk = path_key(key, row * width + col, sample)
    ox, oy, oz, dx, dy, dz = camera_ray(cam, width, height, row, col, uniform(pk, 0), uniform(pk, 1),
                                        uniform(pk, 2), uniform(pk, 3))
    lr, lg, lb = 0.0, 0.0, 0.0            # radiance gathered
    tr, tg, tb = 1.0, 1.0, 1.0            # path throughput
    nodes_sum, tris_sum = 0, 0
    count_emission = True                 # camera rays (and, later, specular bounces) see emitters
    for c in range(CH_ALBEDO, CH_DEPTH):
        out[c] = 0.0
    out[CH_DEPTH] = np.inf
    for depth in range(max_bounces + 1):
        ray = make_ray(ox, oy, oz, dx, dy, dz)
        t, k, u, v, nodes, tris = closest_hit(tree, stack_i, stack_f, ray, INF32)
        nodes_sum += nodes
        tris_sum += tris
        _record_ray(hist, counters, tid, nodes, tris)
        if depth == 0:
            counters[tid, K_CAMERA] += 1
            out[CH_PRIMARY_NODES] = nodes
            out[CH_PRIMARY_TRIS] = tris
        if k < 0:
            lr += tr * geo.environment[0]
            lg += tg * geo.environment[1]
            lb += tb * geo.environment[2]
            break
        tri = tree.refs[k]
        mat = geo.material_params[geo.material_of[tri]]
        nx, ny, nz = geo.tri_normal[tri, 0], geo.tri_normal[tri, 1], geo.tri_normal[tri, 2]
        front = dx * nx + dy * ny + dz * nz < 0.0
        kind = int(mat[M_KIND])
        albedo_r, albedo_g, albedo_b = mat[M_COLOR], mat[M_COLOR + 1], mat[M_COLOR + 2]
        if kind == EMITTER:
            albedo_r, albedo_g, albedo_b = 0.0, 0.0, 0.0
        elif kind == GLASS:
            albedo_r, albedo_g, albedo_b = 1.0, 1.0, 1.0
        if depth == 0:
            out[CH_ALBEDO], out[CH_ALBEDO + 1], out[CH_ALBEDO + 2] = albedo_r, albedo_g, albedo_b
            out[CH_NORMAL], out[CH_NORMAL + 1], out[CH_NORMAL + 2] = nx, ny, nz
            out[CH_DEPTH] = t
        if count_emission and (front or mat[M_TWO_SIDED] > 0.5):
            lr += tr * mat[M_EMISSION]
            lg += tg * mat[M_EMISSION + 1]
            lb += tb * mat[M_EMISSION + 2]
        if depth == max_bounces or kind == EMITTER:
            break
        # Hit point from the barycentrics, on the triangle's plane; the normal turned to the ray's side.
        tv = tree.leaf_tris[k]
        w0 = 1.0 - np.float64(u) - np.float64(v)
        px = w0 * tv[0] + u * np.float64(tv[3]) + v * np.float64(tv[6])
        py = w0 * tv[1] + u * np.float64(tv[4]) + v * np.float64(tv[7])
        pz = w0 * tv[2] + u * np.float64(tv[5]) + v * np.float64(tv[8])
        if not front:
            nx, ny, nz = -nx, -ny, -nz
        eps = OFFSET_SCALE * max(1.0, abs(px), abs(py), abs(pz))
        sx, sy, sz = px + eps * nx, py + eps * ny, pz + eps * nz
        base = 4 + DIMS_PER_BOUNCE * depth
        # Next-event estimation: one point on one emissive triangle.
        n_lights = geo.emit_tris.shape[0]
        if n_lights > 0:
            j = min(np.searchsorted(geo.emit_cdf, uniform(pk, base), side="right"), n_lights - 1)
            s = math.sqrt(uniform(pk, base + 1))
            b2 = uniform(pk, base + 2)
            ev = geo.emit_vertices[j]
            a0, a1, a2 = 1.0 - s, s * (1.0 - b2), s * b2     # uniform on the triangle (Turk 1990)
            qx = a0 * ev[0] + a1 * ev[3] + a2 * ev[6]
            qy = a0 * ev[1] + a1 * ev[4] + a2 * ev[7]
            qz = a0 * ev[2] + a1 * ev[5] + a2 * ev[8]
            wx, wy, wz = qx - sx, qy - sy, qz - sz
            dist2 = wx * wx + wy * wy + wz * wz
            dist = math.sqrt(dist2)
            if dist > 0.0:
                wx, wy, wz = wx / dist, wy / dist, wz / dist
                light_tri = geo.emit_tris[j]
                lmat = geo.material_params[geo.material_of[light_tri]]
                cos_s = wx * nx + wy * ny + wz * nz
                cos_l = -(wx * geo.tri_normal[light_tri, 0] + wy * geo.tri_normal[light_tri, 1]
                          + wz * geo.tri_normal[light_tri, 2])
                if lmat[M_TWO_SIDED] > 0.5:
                    cos_l = abs(cos_l)
                if cos_s > 0.0 and cos_l > 0.0:
                    eps_l = OFFSET_SCALE * max(1.0, abs(qx), abs(qy), abs(qz))
                    shadow = make_ray(sx, sy, sz, wx, wy, wz)
                    blocked, nodes, tris = any_hit(tree, stack_i, stack_f, shadow,
                                                   np.float32(dist - 2.0 * eps_l))
                    nodes_sum += nodes
                    tris_sum += tris
                    _record_ray(hist, counters, tid, nodes, tris)
                    counters[tid, K_SHADOW] += 1
                    if not blocked:
                        # Lambertian f = albedo / pi; pdf over area = p(choose j) / area(j).
                        weight = cos_s * cos_l / dist2 / (math.pi * geo.emit_pdf_area[j])
                        lr += tr * albedo_r * lmat[M_EMISSION] * weight
                        lg += tg * albedo_g * lmat[M_EMISSION + 1] * weight
                        lb += tb * albedo_b * lmat[M_EMISSION + 2] * weight
        # Cosine-weighted hemisphere sample (Malley's method): f cos / pdf = albedo.
        r1 = uniform(pk, base + 3)
        r = math.sqrt(r1)
        phi = 2.0 * math.pi * uniform(pk, base + 4)
        lx, ly, lz = r * math.cos(phi), r * math.sin(phi), math.sqrt(max(0.0, 1.0 - r1))
        t1, t2 = _basis(nx, ny, nz)
        dx = lx * t1[0] + ly * t2[0] + lz * nx
        dy = lx * t1[1] + ly * t2[1] + lz * ny
        dz = lx * t1[2] + ly * t2[2] + lz * nz
        ox, oy, oz = sx, sy, sz
        tr *= albedo_r
        tg *= albedo_g
        tb *= albedo_b
        count_emission = False
        if depth >= ROULETTE_DEPTH:
            survive = min(max(tr, tg, tb), 0.95)
            if survive <= 0.0 or uniform(pk, base + 5) >= survive:
                break
            tr /= survive
            tg /= survive
            tb /= survive
    if math.isfinite(lr) and math.isfinite(lg) and math.isfinite(lb):
        out[0], out[1], out[2] = lr, lg, lb
    else:                                  # never let one bad sample poison the image
        out[0], out[1], out[2] = 0.0, 0.0, 0.0
        counters[tid, K_NONFINITE] += 1
    out[CH_COST_NODES] = nodes_sum
    out[CH_COST_TRIS] = tris_sum


@numba.njit(cache=True, error_model="numpy", parallel=True)
def render_rows(tree, geo, cam, width, height, row0, row1, key, sample, max_bounces, out, hist, counters):
    """Trace sample `sample` of every pixel in rows [row0, row1) into out[row, col, :] (rows dealt out
    one at a time to the threads); per-ray cost histograms and counters go to hist/counters[thread]."""
    for row in numba.prange(row0, row1):
        tid = numba.get_thread_id()
        stack_i = np.empty(STACK_SIZE, dtype=np.int32)
        stack_f = np.empty((STACK_SIZE, 2), dtype=np.float32)
        for col in range(width):
            _trace_path(tree, geo, cam, width, height, row, col, key, sample, max_bounces, stack_i, stack_f,
                        hist, counters, tid, out[row, col])

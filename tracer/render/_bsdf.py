"""Scattering kernels: Lambertian, GGX microfacet conductor, smooth dielectric.

All directions are in a local frame whose z axis is the surface normal turned to the side the light
leaves towards the viewer (wo.z >= 0). `sample_*` return the direction, the sampling weight
f * cos / pdf (per channel) and the pdf in solid angle (0 for a delta lobe); `eval_*` return f * cos
and the pdf of sampling that direction, for multiple importance sampling.

- GGX distribution and Smith masking-shadowing: Walter, Marschner, Li & Torrance (2007), "Microfacet
  models for refraction through rough surfaces", EGSR, eqs. 33-34; height-correlated G2 and Lambda
  from Heitz (2014), "Understanding the masking-shadowing function in microfacet-based BRDFs", JCGT 3(2),
  eqs. 72 and 99.
- Visible-normal sampling: Heitz (2018), "Sampling the GGX distribution of visible normals", JCGT 7(4),
  Listing 1; the pdf of the reflected direction is G1(wo) D(m) / (4 wo.z) (eq. 17 with the Jacobian
  1 / (4 |wo.m|)).
- Schlick (1994), "An inexpensive BRDF model for physically-based rendering", CGF 13(3), eq. 15:
  F = F0 + (1 - F0)(1 - cos)^5 with F0 the metal's `color`.
- Exact unpolarised Fresnel reflectance of a dielectric interface (e.g. Hecht, "Optics", 5th ed., eqs.
  4.34, 4.40) with total internal reflection past the critical angle.
"""
import math

import numba

ROUGHNESS_DELTA = 1e-3      # below this roughness the metal is a perfect mirror (delta lobe)


@numba.njit(cache=True, error_model="numpy", inline="always")
def cosine_hemisphere(u1, u2):
    """Malley's method: a uniform disk point lifted to the hemisphere; pdf = cos / pi."""
    r = math.sqrt(u1)
    phi = 2.0 * math.pi * u2
    return r * math.cos(phi), r * math.sin(phi), math.sqrt(max(0.0, 1.0 - u1))


@numba.njit(cache=True, error_model="numpy", inline="always")
def ggx_d(alpha, mz):
    """GGX normal distribution D(m) (Walter et al. 2007, eq. 33), m.z = cos of the microfacet normal."""
    if mz <= 0.0:
        return 0.0
    a2 = alpha * alpha
    t = mz * mz * (a2 - 1.0) + 1.0
    return a2 / (math.pi * t * t)


@numba.njit(cache=True, error_model="numpy", inline="always")
def ggx_lambda(alpha, z):
    """Smith Lambda for GGX (Heitz 2014, eq. 72)."""
    z2 = z * z
    if z2 >= 1.0:
        return 0.0
    tan2 = (1.0 - z2) / max(z2, 1e-300)
    return 0.5 * (-1.0 + math.sqrt(1.0 + alpha * alpha * tan2))


@numba.njit(cache=True, error_model="numpy", inline="always")
def schlick(f0, cos):
    c = 1.0 - max(0.0, min(1.0, cos))
    c2 = c * c
    return f0 + (1.0 - f0) * c2 * c2 * c


@numba.njit(cache=True, error_model="numpy")
def ggx_sample_visible_normal(alpha, wx, wy, wz, u1, u2):
    """Heitz 2018, Listing 1 (isotropic alpha): a microfacet normal distributed as D_wo(m)."""
    vx, vy, vz = alpha * wx, alpha * wy, wz
    inv = 1.0 / math.sqrt(vx * vx + vy * vy + vz * vz)
    vx, vy, vz = vx * inv, vy * inv, vz * inv
    lensq = vx * vx + vy * vy
    if lensq > 0.0:
        s = 1.0 / math.sqrt(lensq)
        t1x, t1y, t1z = -vy * s, vx * s, 0.0
    else:
        t1x, t1y, t1z = 1.0, 0.0, 0.0
    t2x, t2y, t2z = vy * t1z - vz * t1y, vz * t1x - vx * t1z, vx * t1y - vy * t1x
    r = math.sqrt(u1)
    phi = 2.0 * math.pi * u2
    p1, p2 = r * math.cos(phi), r * math.sin(phi)
    s = 0.5 * (1.0 + vz)
    p2 = (1.0 - s) * math.sqrt(max(0.0, 1.0 - p1 * p1)) + s * p2
    p3 = math.sqrt(max(0.0, 1.0 - p1 * p1 - p2 * p2))
    nx = p1 * t1x + p2 * t2x + p3 * vx
    ny = p1 * t1y + p2 * t2y + p3 * vy
    nz = p1 * t1z + p2 * t2z + p3 * vz
    mx, my, mz = alpha * nx, alpha * ny, max(0.0, nz)
    inv = 1.0 / math.sqrt(mx * mx + my * my + mz * mz)
    return mx * inv, my * inv, mz * inv


@numba.njit(cache=True, error_model="numpy")
def metal_eval(alpha, f0r, f0g, f0b, ox, oy, oz, ix, iy, iz):
    """f * cos and pdf for the GGX conductor, wo = o, wi = i (local frame)."""
    if oz <= 0.0 or iz <= 0.0:
        return 0.0, 0.0, 0.0, 0.0
    hx, hy, hz = ox + ix, oy + iy, oz + iz
    inv = 1.0 / math.sqrt(hx * hx + hy * hy + hz * hz)
    hx, hy, hz = hx * inv, hy * inv, hz * inv
    d = ggx_d(alpha, hz)
    lam_o, lam_i = ggx_lambda(alpha, oz), ggx_lambda(alpha, iz)
    g2 = 1.0 / (1.0 + lam_o + lam_i)
    g1 = 1.0 / (1.0 + lam_o)
    cos_h = ox * hx + oy * hy + oz * hz
    common = d * g2 / (4.0 * oz)           # f * cos = D G2 F / (4 cos_o cos_i) * cos_i
    pdf = g1 * d / (4.0 * oz)
    return (common * schlick(f0r, cos_h), common * schlick(f0g, cos_h), common * schlick(f0b, cos_h), pdf)


@numba.njit(cache=True, error_model="numpy")
def metal_sample(alpha, f0r, f0g, f0b, ox, oy, oz, u1, u2):
    """Sample the GGX conductor: (ix, iy, iz, weight r, g, b, pdf); pdf 0 marks the mirror's delta lobe."""
    if alpha < ROUGHNESS_DELTA * ROUGHNESS_DELTA:
        # Perfect mirror: reflect about z; weight = F(cos) (Schlick), no pdf (delta).
        return (-ox, -oy, oz, schlick(f0r, oz), schlick(f0g, oz), schlick(f0b, oz), 0.0)
    mx, my, mz = ggx_sample_visible_normal(alpha, ox, oy, oz, u1, u2)
    cos_h = ox * mx + oy * my + oz * mz
    ix, iy, iz = 2.0 * cos_h * mx - ox, 2.0 * cos_h * my - oy, 2.0 * cos_h * mz - oz
    if iz <= 0.0:                           # reflected under the surface: the path ends (energy lost)
        return ix, iy, iz, 0.0, 0.0, 0.0, 1.0
    lam_o, lam_i = ggx_lambda(alpha, oz), ggx_lambda(alpha, iz)
    g2_over_g1 = (1.0 + lam_o) / (1.0 + lam_o + lam_i)       # weight = F G2 / G1 (Heitz 2018, eq. 19)
    pdf = ggx_d(alpha, mz) / (4.0 * oz * (1.0 + lam_o))
    return (ix, iy, iz, schlick(f0r, cos_h) * g2_over_g1, schlick(f0g, cos_h) * g2_over_g1,
            schlick(f0b, cos_h) * g2_over_g1, pdf)


@numba.njit(cache=True, error_model="numpy")
def fresnel_dielectric(cos_i, eta):
    """Unpolarised reflectance at an interface, eta = n_transmitted / n_incident, cos_i >= 0.

    Returns (R, cos_t); R = 1 under total internal reflection.
    """
    sin2_t = (1.0 - cos_i * cos_i) / (eta * eta)
    if sin2_t >= 1.0:
        return 1.0, 0.0
    cos_t = math.sqrt(1.0 - sin2_t)
    r_s = (cos_i - eta * cos_t) / (cos_i + eta * cos_t)       # s-polarised amplitude
    r_p = (eta * cos_i - cos_t) / (eta * cos_i + cos_t)       # p-polarised amplitude
    return 0.5 * (r_s * r_s + r_p * r_p), cos_t

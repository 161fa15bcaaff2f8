"""Metal and glass against optics and microfacet theory; robustness of the radiance estimate.

Sources, named again beside each check:
- Fresnel equations for s and p polarisation, Snell's law, Brewster's angle and total internal reflection:
  Hecht, "Optics", 5th ed., sections 4.6-4.7 (formulas from memory, written out below and checked against
  the identities they must satisfy).
- Transmission of a slab with incoherent multiple reflections, T = (1 - R) / (1 + R): the geometric
  series (1 - R)^2 (1 + R^2 + R^4 + ...) of the reflections inside the slab (Hecht, section 9.7 treats
  the coherent case; the incoherent sum is common practice).
- Schlick (1994), "An inexpensive BRDF model for physically-based rendering", CGF 13(3), eq. 15.
- GGX distribution: Walter, Marschner, Li & Torrance (2007), "Microfacet models for refraction through
  rough surfaces", EGSR, eq. 33; Smith Lambda for GGX and the height-correlated masking-shadowing
  G2 = 1 / (1 + Lambda(o) + Lambda(i)): Heitz (2014), "Understanding the masking-shadowing function in
  microfacet-based BRDFs", JCGT 3(2).
- White furnace: a closed, convex, non-absorbing object in uniform light reflects at most that light
  (energy conservation; common practice).
"""
import math

import numpy as np
import pytest
from naive_ray import pinhole_rays
from scipy import integrate, stats

import tracer
from tracer.render._bsdf import fresnel_dielectric, metal_eval, metal_sample
from tracer.scene.types import M_EMISSION

# ---- tolerances, one per kind of check ----
# Results that are exact up to float32 storage of per-sample radiance (2^-24 = 6e-8, IEEE 754 binary32).
FLOAT_RTOL = 1e-6
# A closed form evaluated in float64: a handful of roundings of 2^-53 = 1.1e-16 each (IEEE 754 binary64).
DOUBLE_RTOL = 1e-14
# One quantity by two different float64 routes (square roots of 1 - cos^2 near grazing lose digits).
FORMULA_RTOL = 1e-9
# Monte Carlo means within this many standard errors of the truth (common practice: 3 sigma) ...
STANDARD_ERRORS = 3.0
# ... and every Monte Carlo check must be sharp: its standard error below this fraction of the value.
MAX_RELATIVE_ERROR = 0.01
# Across many pixels at once: the family-wise false-alarm rate, split over the pixels (Bonferroni
# correction; common practice).
FAMILY_FALSE_ALARM = 1e-3
# Published reflectances of glass quoted with four decimals (from memory, see the test): half a unit in
# the last place.
TABLE_ATOL = 5e-5
# Gauss-Legendre on 512 x 512 nodes of the directional albedo (the integrand has a kink where the
# reflected direction crosses the horizon): within 2.4e-5 of nested adaptive quadrature for roughness
# 0.05-1 and cos_o 0.15-1 (measured while writing this test); 4x margin. Checked below against a closed
# form and one adaptive quadrature.
ALBEDO_QUADRATURE_ATOL = 1e-4
ALBEDO_NODES = 512


def load(tmp_path, text: str, name: str = "scene"):
    """Write a scene file of our own into tmp_path and load it through the public parser."""
    path = tmp_path / f"{name}.toml"
    path.write_text(text)
    return tracer.load_scene(path)


# ---- reference formulas written out here, independent of tracer.render._bsdf ----

def hecht_fresnel(theta_i, n_i, n_t):
    """(R_s, R_p) at a planar interface: Fresnel amplitude coefficients (Hecht, eqs. 4.42 and 4.43)
        r_s = (n_i cos_i - n_t cos_t) / (n_i cos_i + n_t cos_t)
        r_p = (n_t cos_i - n_i cos_t) / (n_i cos_t + n_t cos_i)
    with Snell's law n_i sin_i = n_t sin_t (Hecht, eq. 4.4); (1, 1) under total internal reflection."""
    sin_t = n_i * math.sin(theta_i) / n_t
    if sin_t >= 1.0:
        return 1.0, 1.0
    cos_i, cos_t = math.cos(theta_i), math.sqrt(1.0 - sin_t * sin_t)
    r_s = (n_i * cos_i - n_t * cos_t) / (n_i * cos_i + n_t * cos_t)
    r_p = (n_t * cos_i - n_i * cos_t) / (n_i * cos_t + n_t * cos_i)
    return r_s * r_s, r_p * r_p


def normal_reflectance(n: float) -> float:
    """R = ((n - 1) / (n + 1))^2 at normal incidence (Hecht, eq. 4.47)."""
    return ((n - 1.0) / (n + 1.0)) ** 2


def schlick(f0, cos):
    """Schlick 1994, eq. 15: F = F0 + (1 - F0)(1 - cos)^5."""
    return f0 + (1.0 - f0) * (1.0 - cos) ** 5


def ggx_lambda(alpha, z):
    """Smith Lambda of GGX for a direction with cos theta = z (Heitz 2014, eq. 72):
    (-1 + sqrt(1 + alpha^2 tan^2 theta)) / 2."""
    z = np.clip(z, 1e-300, 1.0)
    return 0.5 * (-1.0 + np.sqrt(1.0 + alpha * alpha * (1.0 - z * z) / (z * z)))


def directional_albedo(alpha: float, cos_o: float, f0: float = 1.0, nodes: int = ALBEDO_NODES) -> float:
    """Integral of f cos over the hemisphere for the GGX conductor with Schlick's F (Walter et al. 2007,
    eq. 20 with D of eq. 33; height-correlated G2, Heitz 2014), seen from wo = (sin, 0, cos).

    Integrated over the microfacet normal m (d omega_i = 4 (o.m) d omega_m, Walter eq. 14), with m
    parametrised by xi = tan^2 theta_m / (alpha^2 + tan^2 theta_m), the cumulative distribution of
    D(m) cos theta_m, so that D(m) cos theta_m d omega_m = d xi d phi / (2 pi): the sharp peak of D
    becomes a flat integrand. Gauss-Legendre in xi and phi.
    """
    x, w = np.polynomial.legendre.leggauss(nodes)
    xi, phi = np.meshgrid(0.5 * (x + 1.0), math.pi * (x + 1.0), indexing="ij")
    weight = np.outer(0.5 * w, math.pi * w) / (2.0 * math.pi)
    tan2 = alpha * alpha * xi / (1.0 - xi)
    cos_m = 1.0 / np.sqrt(1.0 + tan2)
    sin_m = np.sqrt(tan2) * cos_m
    o_dot_m = sin_m * np.cos(phi) * math.sqrt(1.0 - cos_o * cos_o) + cos_m * cos_o
    cos_i = 2.0 * o_dot_m * cos_m - cos_o                     # z of i = 2 (o.m) m - o
    valid = (cos_i > 0.0) & (o_dot_m > 0.0)
    g2 = 1.0 / (1.0 + ggx_lambda(alpha, cos_o) + ggx_lambda(alpha, np.where(valid, cos_i, 1.0)))
    # f cos_i d omega_i = D G2 F / (4 cos_o) * 4 (o.m) d omega_m = (o.m) G2 F / (cos_o cos_m) d xi dphi/2pi
    integrand = o_dot_m * g2 * schlick(f0, np.clip(o_dot_m, 0.0, 1.0)) / (cos_o * cos_m)
    return float(np.sum(np.where(valid, integrand, 0.0) * weight))


# ---- 1. glass slab at normal incidence ----

SLAB_SCENE = """
[camera]
position = [0.0, 0.0, 3.0]
look_at = [0.0, 0.0, 0.0]
fov = 2.0

[materials.pane]
type = "glass"
ior = {ior}

[materials.lamp]
type = "emitter"
radiance = [{le}, {le}, {le}]

[[objects]]
shape = "box"
center = [0.0, 0.0, 0.0]
size = [4.0, 4.0, 0.1]
material = "pane"

[[objects]]
shape = "rect"
center = [0.0, 0.0, -2.0]
size = [20.0, 20.0]
normal = [0.0, 0.0, 1.0]
material = "lamp"
"""
SLAB_SIZE = 24
SLAB_SAMPLES = 32
SLAB_RADIANCE = 2.0


@pytest.mark.parametrize("ior", (1.33, 1.5, 2.0))
def test_glass_slab_transmits_fresnel_fraction(tmp_path, ior):
    """A thin glass slab between the camera and a uniform emitter of radiance Le, seen at normal
    incidence: L = Le (1 - R) / (1 + R), R = ((n - 1) / (n + 1))^2 (Fresnel equations, Hecht eq. 4.47;
    incoherent multiple reflections inside the slab summed as a geometric series). The radiance change
    (n_i / n_t)^2 at the entry cancels at the exit."""
    scene = load(tmp_path, SLAB_SCENE.format(ior=ior, le=SLAB_RADIANCE))
    n = float(np.float32(ior))                         # the kernels see the float32 material row
    reflectance = normal_reflectance(n)
    expected = SLAB_RADIANCE * (1.0 - reflectance) / (1.0 + reflectance)
    # The corner pixel's ray meets the slab 1.4 degrees off the normal; the unpolarised reflectance
    # there differs from normal incidence by far less than the statistical tolerance.
    corner = math.atan(math.tan(math.radians(1.0)) * math.sqrt(2.0))
    corner_r = 0.5 * sum(hecht_fresnel(corner, 1.0, n))
    assert abs((1.0 - corner_r) / (1.0 + corner_r) - (1.0 - reflectance) / (1.0 + reflectance)) < 1e-4

    result = tracer.render(scene, samples=SLAB_SAMPLES, width=SLAB_SIZE, height=SLAB_SIZE, bounces=64,
                           seed=11, threads=1)
    assert result.stats["render"]["nonfinite_samples"] == 0
    radiance = result.radiance.astype(np.float64)
    np.testing.assert_array_equal(radiance[..., 0], radiance[..., 1])      # grey light, grey glass
    # Pixels are independent estimates (each has its own scrambled sequence) of the same value.
    pixel_means = radiance[..., 0].ravel()
    standard_error = pixel_means.std(ddof=1) / math.sqrt(pixel_means.size)
    assert standard_error < MAX_RELATIVE_ERROR * expected
    measured = pixel_means.mean()
    assert abs(measured - expected) < STANDARD_ERRORS * standard_error, (
        f"n = {n}: transmitted {measured:.5f}, Fresnel slab {expected:.5f} (se {standard_error:.1e})")


# ---- 2. Fresnel reflectance of one interface ----

GLASS = 1.5


@pytest.mark.parametrize("n", (1.33, 1.5, 2.0, 2.42))
def test_fresnel_normal_incidence(n):
    """R = ((n - 1) / (n + 1))^2 at normal incidence, entering or leaving (Hecht, eq. 4.47)."""
    entering, cos_t = fresnel_dielectric(1.0, n)
    leaving, _ = fresnel_dielectric(1.0, 1.0 / n)
    assert cos_t == 1.0
    assert entering == pytest.approx(normal_reflectance(n), rel=DOUBLE_RTOL, abs=0.0)
    assert leaving == pytest.approx(normal_reflectance(n), rel=DOUBLE_RTOL, abs=0.0)


@pytest.mark.parametrize("n", (1.33, 1.5, 2.0, 2.42))
def test_total_internal_reflection(n):
    """From the dense side (eta = n_t / n_i = 1/n) light is totally reflected beyond the critical angle
    arcsin(1/n), and partly transmitted below it (Snell's law, Hecht section 4.7); R rises to 1 as the
    angle approaches the critical one from below."""
    critical = math.asin(1.0 / n)
    for theta in np.linspace(critical + 1e-6, 0.5 * math.pi, 40):
        reflectance, cos_t = fresnel_dielectric(math.cos(theta), 1.0 / n)
        assert reflectance == 1.0 and cos_t == 0.0
    below = np.linspace(0.0, critical - 1e-6, 40)
    values = [fresnel_dielectric(math.cos(theta), 1.0 / n)[0] for theta in below]
    assert max(values) < 1.0
    assert np.all(np.diff(values) > 0.0)                       # monotonic up to the critical angle
    # Continuous at the critical angle: 1 - R falls like the square root of the distance to it.
    assert fresnel_dielectric(math.cos(critical - 1e-12), 1.0 / n)[0] > 0.999


def test_fresnel_against_hecht():
    """Unpolarised R = (R_s + R_p) / 2 (Hecht, eq. 4.70 and section 8.6) against the s/p amplitude
    formulas written above, entering and leaving glass, and Snell's law for the returned cos_t."""
    for n in (1.33, GLASS, 2.0):
        for eta, n_i, n_t in ((n, 1.0, n), (1.0 / n, n, 1.0)):
            for theta in np.linspace(0.0, 0.5 * math.pi - 1e-3, 61):
                r_s, r_p = hecht_fresnel(theta, n_i, n_t)
                reflectance, cos_t = fresnel_dielectric(math.cos(theta), eta)
                assert reflectance == pytest.approx(0.5 * (r_s + r_p), rel=FORMULA_RTOL)
                if reflectance < 1.0:
                    sin_t = math.sqrt(max(0.0, 1.0 - cos_t * cos_t))
                    assert n_i * math.sin(theta) == pytest.approx(n_t * sin_t, rel=FORMULA_RTOL)


def test_fresnel_published_values_glass():
    """Glass, n = 1.5 (values from memory of the reflectance curves in Hecht, Fig. 4.50, and the
    identities behind them):
    - at 45 degrees R_s = 0.0920, R_p = 0.0085 (and R_p = R_s^2 exactly at 45 degrees, Abeles' relation);
    - at Brewster's angle atan(n) = 56.31 degrees R_p = 0 and R_s = ((n^2 - 1) / (n^2 + 1))^2 = 0.1479, so
      the unpolarised R is R_s / 2."""
    r_s, r_p = hecht_fresnel(math.radians(45.0), 1.0, GLASS)
    assert r_s == pytest.approx(0.0920, abs=TABLE_ATOL)
    assert r_p == pytest.approx(0.0085, abs=TABLE_ATOL)
    assert r_p == pytest.approx(r_s * r_s, rel=FORMULA_RTOL)
    assert fresnel_dielectric(math.cos(math.radians(45.0)), GLASS)[0] == pytest.approx(0.5 * (r_s + r_p),
                                                                                     rel=FORMULA_RTOL)
    brewster = math.atan(GLASS)
    assert math.degrees(brewster) == pytest.approx(56.31, abs=0.005)
    r_s, r_p = hecht_fresnel(brewster, 1.0, GLASS)
    assert r_p == pytest.approx(0.0, abs=1e-30)
    assert r_s == pytest.approx(((GLASS**2 - 1.0) / (GLASS**2 + 1.0)) ** 2, rel=FORMULA_RTOL)
    assert r_s == pytest.approx(0.1479, abs=TABLE_ATOL)
    assert fresnel_dielectric(math.cos(brewster), GLASS)[0] == pytest.approx(0.5 * r_s, rel=FORMULA_RTOL)
    # Leaving the glass at the internal Brewster angle atan(1/n), p light again passes entirely.
    assert hecht_fresnel(math.atan(1.0 / GLASS), GLASS, 1.0)[1] == pytest.approx(0.0, abs=1e-30)


def test_fresnel_reciprocity():
    """Stokes relations: an interface reflects the same fraction both ways along one ray,
    R(theta_i, n) = R(theta_t, 1/n) with theta_t from Snell's law (Hecht, section 4.10)."""
    for n in (1.33, GLASS, 2.0):
        for theta in np.linspace(0.0, 0.5 * math.pi - 1e-3, 37):
            forward, cos_t = fresnel_dielectric(math.cos(theta), n)
            backward, cos_back = fresnel_dielectric(cos_t, 1.0 / n)
            assert backward == pytest.approx(forward, rel=FORMULA_RTOL)
            assert cos_back == pytest.approx(math.cos(theta), rel=FORMULA_RTOL)


# ---- 3. mirror ----

MIRROR_COLOR = (0.9, 0.6, 0.3)
MIRROR_RADIANCE = (2.0, 3.0, 4.0)
MIRROR_SCENE = """
[camera]
position = {position}
look_at = {look_at}
up = [0.0, 0.0, -1.0]
fov = 2.0

[materials.silver]
type = "metal"
color = {color}
roughness = 0.0

[materials.lamp]
type = "emitter"
radiance = {radiance}

[[objects]]
shape = "rect"
center = [0.1, 0.0, 0.05]
size = [4.0, 4.0]
normal = [0.0, 1.0, 0.0]
material = "silver"

[[objects]]
shape = "rect"
center = {lamp_center}
size = [30.0, 30.0]
normal = {lamp_normal}
material = "lamp"
"""
MIRROR_SIZE = 16                # even: see test_mirror_schlick_at_oblique_incidence


def mirror_scene(tmp_path, incidence_degrees: float):
    """A mirror in the plane y = 0; the camera 2 units from the point (0.1, 0, 0.05) at the given angle
    from the normal, in the y-z plane; a large emitter facing the mirror across the reflected rays."""
    theta = math.radians(incidence_degrees)
    target = np.array([0.1, 0.0, 0.05])
    view = np.array([0.0, math.cos(theta), math.sin(theta)])           # from the mirror to the camera
    reflected = np.array([0.0, math.cos(theta), -math.sin(theta)])
    position = target + 2.0 * view
    lamp_center = target + 6.0 * reflected

    def vec(v):
        return "[" + ", ".join(f"{x:.12f}" for x in v) + "]"

    text = MIRROR_SCENE.format(position=vec(position), look_at=vec(target), lamp_center=vec(lamp_center),
                               lamp_normal=vec(-reflected), color=vec(MIRROR_COLOR),
                               radiance=vec(MIRROR_RADIANCE))
    return load(tmp_path, text, f"mirror-{incidence_degrees:g}"), position, target


def test_mirror_at_normal_incidence(tmp_path):
    """A mirror of colour c reflecting an emitter of radiance Le at normal incidence shows c Le: Schlick's
    F = F0 + (1 - F0)(1 - cos)^5 = F0 = c at cos = 1 (Schlick 1994, eq. 15; the rays here are within
    1.4 degrees of the normal, where (1 - cos)^5 < 1e-17). Exact: a delta lobe, no light sampling, and
    the emitter is seen with MIS weight 1 (one bounce suffices: a mirror reflection counts as one)."""
    scene, _, _ = mirror_scene(tmp_path, 0.0)
    expected = (np.asarray(MIRROR_COLOR, np.float32).astype(np.float64)
                * np.asarray(MIRROR_RADIANCE, np.float32).astype(np.float64))
    for bounces in (1, 4):
        result = tracer.render(scene, samples=4, width=MIRROR_SIZE, height=MIRROR_SIZE, bounces=bounces,
                               seed=3, threads=1)
        radiance = result.radiance.astype(np.float64)
        np.testing.assert_allclose(radiance, np.broadcast_to(expected, radiance.shape), rtol=FLOAT_RTOL)
        assert result.stats["render"]["rays_shadow"] == 0           # a delta lobe samples no light
    dark = tracer.render(scene, samples=4, width=MIRROR_SIZE, height=MIRROR_SIZE, bounces=0, seed=3,
                         threads=1)
    assert np.all(dark.radiance == 0.0)                              # the reflection needs one bounce


def test_mirror_schlick_at_oblique_incidence(tmp_path):
    """At 70 degrees the mirror shows F(cos) Le with Schlick's F (Schlick 1994, eq. 15) at each sample's
    angle of incidence. F changes by ~0.4% across one pixel here, so each pixel mean must lie between the
    values of F Le at the pixel's four corners (the per-pixel reference camera of tests/naive_ray.py): cos
    of incidence has no stationary point inside a pixel (the image's centre column, where its
    horizontal derivative vanishes, is a pixel border for an even width), so its extremes over the
    pixel square lie at corners. Also F must rise towards grazing across the image."""
    scene, position, target = mirror_scene(tmp_path, 70.0)
    result = tracer.render(scene, samples=8, width=MIRROR_SIZE, height=MIRROR_SIZE, bounces=1, seed=3,
                           threads=1)
    f0 = np.asarray(MIRROR_COLOR, np.float32).astype(np.float64)
    radiance = np.asarray(MIRROR_RADIANCE, np.float32).astype(np.float64)
    corners = []
    for offset in ((0.0, 0.0), (1.0, 0.0), (0.0, 1.0), (1.0, 1.0)):
        _, directions = pinhole_rays(position, target, (0.0, 0.0, -1.0), 2.0, MIRROR_SIZE, MIRROR_SIZE,
                                     offset=offset)
        corners.append(schlick(f0, -directions[..., 1:2]) * radiance)        # cos_i = -d . (0, 1, 0)
    low, high = np.min(corners, axis=0), np.max(corners, axis=0)
    assert np.all(result.radiance >= low * (1.0 - FLOAT_RTOL))
    assert np.all(result.radiance <= high * (1.0 + FLOAT_RTOL))
    blue = result.radiance[..., 2]
    assert blue[0].mean() > blue[-1].mean()      # the top rows look more grazing: more reflection


# ---- 4. white furnace for metal ----

FURNACE_SCENE = """
[camera]
position = [0.0, 0.0, 4.0]
look_at = [0.0, 0.0, 0.0]
fov = 32.0

[environment]
radiance = [1.0, 1.0, 1.0]

[materials.steel]
type = "metal"
color = [1.0, 1.0, 1.0]
roughness = {roughness}

[[objects]]
shape = "sphere"
radius = 1.0
subdivisions = 3
material = "steel"
"""
FURNACE_SIZE = 16
# Independent replicates (one seed each) of FURNACE_SAMPLES samples: per-sample values are skewed (near a
# mirror most samples lie a hair above the albedo and a few far below), so each replicate averages
# enough samples for its mean to be close to normal (central limit theorem) before the t test.
FURNACE_SEEDS = 8
FURNACE_SAMPLES = 32


def test_furnace_mirror_sphere_is_exact(tmp_path):
    """A convex mirror (roughness 0, colour 1) in uniform radiance 1 reflects exactly 1 everywhere: F = 1,
    and every reflected ray leaves the convex polyhedron and sees the environment (common practice)."""
    scene = load(tmp_path, FURNACE_SCENE.format(roughness=0.0))
    result = tracer.render(scene, samples=8, width=FURNACE_SIZE, height=FURNACE_SIZE, bounces=4, seed=1,
                           threads=1)
    assert result.channels["depth.Z"].min() < 4.0                  # the sphere is in view
    np.testing.assert_allclose(result.radiance, 1.0, rtol=FLOAT_RTOL)


@pytest.mark.parametrize("roughness", (0.05, 0.3, 0.7, 1.0))
def test_furnace_rough_sphere_never_exceeds_one(tmp_path, roughness):
    """A rough metal sphere of colour 1 in uniform radiance 1 (white furnace, common practice): each pixel's
    expected value is a directional albedo, at most 1. Checked per pixel over independent renders (one
    seed each: independent scrambles): the mean may exceed 1 only by the one-sided t quantile of
    FAMILY_FALSE_ALARM split over the pixels (Bonferroni). The plate test below checks the values."""
    scene = load(tmp_path, FURNACE_SCENE.format(roughness=roughness))
    accel = tracer.build_accel(scene.vertices, scene.faces, kind="bvh")
    renders = np.array([tracer.render(scene, accel=accel, samples=FURNACE_SAMPLES, width=FURNACE_SIZE,
                                      height=FURNACE_SIZE, bounces=4, seed=seed, threads=1).radiance[..., 0]
                        for seed in range(FURNACE_SEEDS)], np.float64)
    mean = renders.mean(axis=0)
    standard_error = renders.std(axis=0, ddof=1) / math.sqrt(FURNACE_SEEDS)
    quantile = stats.t.ppf(1.0 - FAMILY_FALSE_ALARM / mean.size, df=FURNACE_SEEDS - 1)
    excess = mean - 1.0 - FLOAT_RTOL
    assert np.all(excess <= quantile * standard_error), (
        f"worst pixel {mean.flat[np.argmax(excess)]:.4f} +- {standard_error.flat[np.argmax(excess)]:.4f}")
    assert np.count_nonzero(np.abs(mean - 1.0) > 0.0) > 100           # the sphere fills much of the view


PLATE_SCENE = """
[camera]
position = {position}
look_at = [0.13, 0.0, 0.07]
up = [0.0, 0.0, 1.0]
fov = 0.5

[environment]
radiance = [1.0, 1.0, 1.0]

[materials.plate]
type = "metal"
color = [{f0}, {f0}, {f0}]
roughness = {roughness}

[[objects]]
shape = "rect"
center = [0.0, 0.0, 0.0]
size = [4.0, 4.0]
normal = [0.0, 1.0, 0.0]
material = "plate"
"""
PLATE_SIZE = 32
PLATE_SAMPLES = 16


def test_albedo_quadrature_closed_form():
    """Our quadrature of the directional albedo against a closed form: for alpha = 1, D = 1/pi and
    Lambda(i) = (1/cos_i - 1) / 2, so at normal incidence (theta_i = 2 theta_m, reflection below the horizon
    beyond theta_m = 45 degrees) the albedo is 2 * integral_0^(pi/4) tan(t) cos(2t) dt = 1 - ln 2
    (derived from Walter 2007 eq. 33 and Heitz 2014 eq. 72), and against nested adaptive quadrature of
    the same formulas for a sharp lobe seen obliquely."""
    assert directional_albedo(1.0, 1.0) == pytest.approx(1.0 - math.log(2.0), abs=ALBEDO_QUADRATURE_ATOL)
    alpha, cos_o = 0.09, 0.5
    sin_o = math.sqrt(1.0 - cos_o * cos_o)

    def integrand(phi, theta_m):
        cos_m, sin_m = math.cos(theta_m), math.sin(theta_m)
        o_dot_m = sin_m * math.cos(phi) * sin_o + cos_m * cos_o
        cos_i = 2.0 * o_dot_m * cos_m - cos_o
        d = alpha**2 / (math.pi * (cos_m**2 * (alpha**2 - 1.0) + 1.0) ** 2)
        g2 = 1.0 / (1.0 + float(ggx_lambda(alpha, cos_o)) + float(ggx_lambda(alpha, max(cos_i, 1e-300))))
        return 2.0 * d * o_dot_m / cos_o * g2 * sin_m            # 2: phi over [0, pi] by symmetry

    def phi_limit(theta_m):
        """The reflected direction is above the horizon (cos_i > 0, hence o.m > 0) for phi below this."""
        cos_m, sin_m = math.cos(theta_m), math.sin(theta_m)
        if sin_m == 0.0:
            return math.pi if cos_m * cos_m > 0.5 else 0.0
        bound = (cos_o / (2.0 * cos_m) - cos_m * cos_o) / (sin_m * sin_o)
        return math.acos(min(1.0, max(-1.0, bound)))

    exact, _ = integrate.quad(lambda t: integrate.quad(integrand, 0.0, phi_limit(t), args=(t,))[0], 0.0,
                              0.5 * math.pi, points=(0.5 * alpha, alpha, 2.0 * alpha, 4.0 * alpha),
                              limit=200, epsabs=1e-9)
    assert directional_albedo(alpha, cos_o) == pytest.approx(exact, abs=ALBEDO_QUADRATURE_ATOL)


@pytest.mark.parametrize(("roughness", "f0"), ((0.05, 1.0), (0.3, 1.0), (0.7, 1.0), (1.0, 1.0), (0.5, 0.4)))
@pytest.mark.parametrize("view_degrees", (0.0, 60.0))
def test_furnace_plate_reflects_directional_albedo(tmp_path, roughness, f0, view_degrees):
    """A flat metal plate in uniform radiance 1, seen at a fixed angle (narrow view), shows its directional
    albedo: the integral of f cos over the hemisphere (Walter et al. 2007; Heitz 2014), <= 1 (white
    furnace, common practice), computed above by quadrature of formulas written in this test. This is
    the integrator's MIS of environment and BSDF sampling checked against the BRDF's definition."""
    theta = math.radians(view_degrees)
    position = f"[{0.13 + 2.0 * math.sin(theta):.12f}, {2.0 * math.cos(theta):.12f}, 0.07]"
    scene = load(tmp_path, PLATE_SCENE.format(position=position, f0=f0, roughness=roughness))
    alpha = float(np.float32(roughness)) ** 2
    expected = directional_albedo(alpha, math.cos(theta), float(np.float32(f0)))
    assert expected <= 1.0
    result = tracer.render(scene, samples=PLATE_SAMPLES, width=PLATE_SIZE, height=PLATE_SIZE, bounces=2,
                           seed=5, threads=1)
    pixels = result.radiance[..., 0].astype(np.float64).ravel()
    standard_error = pixels.std(ddof=1) / math.sqrt(pixels.size)
    assert standard_error < MAX_RELATIVE_ERROR * expected
    measured = pixels.mean()
    assert abs(measured - expected) < STANDARD_ERRORS * standard_error + ALBEDO_QUADRATURE_ATOL, (
        f"roughness {roughness}, view {view_degrees}: plate {measured:.5f}, albedo {expected:.5f} "
        f"(se {standard_error:.1e})")


# ---- sampling weights of the metal against its evaluation ----

METAL_CASES = ((0.0025, 0.9), (0.09, 1.0), (0.09, 0.3), (0.49, 0.6), (1.0, 0.15))
WEIGHT_SAMPLES = 20000


@pytest.mark.parametrize(("alpha", "cos_o"), METAL_CASES)
def test_metal_sample_weight_is_eval_over_pdf(alpha, cos_o):
    """Importance sampling identity (Heitz 2018, eq. 19; Veach 1997, ch. 2): every sample's weight is
    f cos / pdf of metal_eval at the sampled direction, its pdf is metal_eval's pdf; so the mean weight
    is the directional albedo: inside [0, 1] and equal (3 standard errors) to the quadrature of f cos
    over the hemisphere, both of metal_eval and of the formulas written in this test."""
    rng = np.random.default_rng(20240605)
    wo = (math.sqrt(1.0 - cos_o * cos_o), 0.0, cos_o)
    f0 = (0.95, 0.6, 0.25)
    samples = np.array([metal_sample(alpha, *f0, *wo, u1, u2) for u1, u2 in rng.random((WEIGHT_SAMPLES, 2))])
    direction, weights, pdf = samples[:, 0:3], samples[:, 3:6], samples[:, 6]
    np.testing.assert_allclose(np.linalg.norm(direction, axis=1), 1.0, rtol=FORMULA_RTOL)
    above = direction[:, 2] > 0.0
    assert np.all(weights[~above] == 0.0)                     # reflected under the surface: absorbed
    evaluated = np.array([metal_eval(alpha, *f0, *wo, *wi) for wi in direction[above]])
    np.testing.assert_allclose(pdf[above], evaluated[:, 3], rtol=FORMULA_RTOL)
    np.testing.assert_allclose(weights[above], evaluated[:, 0:3] / evaluated[:, 3:4], rtol=FORMULA_RTOL)
    for channel, colour in enumerate(f0):
        mean = weights[:, channel].mean()
        standard_error = weights[:, channel].std(ddof=1) / math.sqrt(WEIGHT_SAMPLES)
        expected = directional_albedo(alpha, cos_o, float(colour))
        assert 0.0 <= mean <= 1.0
        assert abs(mean - expected) < STANDARD_ERRORS * standard_error + ALBEDO_QUADRATURE_ATOL, (
            f"channel {channel}: mean weight {mean:.5f}, albedo {expected:.5f}")


@pytest.mark.parametrize(("alpha", "cos_o"), METAL_CASES)
def test_metal_eval_matches_microfacet_formula(alpha, cos_o):
    """metal_eval's f cos and pdf against the formulas written here: f cos = D G2 F / (4 cos_o) (Walter et
    al. 2007, eq. 20; height-correlated G2, Heitz 2014), pdf = G1(o) D(h) / (4 cos_o) (Heitz 2018), at
    random directions over the hemisphere."""
    rng = np.random.default_rng(7)
    wo = np.array([math.sqrt(1.0 - cos_o * cos_o), 0.0, cos_o])
    f0 = 0.7
    directions = rng.normal(size=(500, 3))
    directions /= np.linalg.norm(directions, axis=1, keepdims=True)
    directions[:, 2] = np.abs(directions[:, 2])
    for wi in directions:
        h = (wo + wi) / np.linalg.norm(wo + wi)
        d = alpha**2 / (math.pi * (h[2] ** 2 * (alpha**2 - 1.0) + 1.0) ** 2)
        lam_o, lam_i = float(ggx_lambda(alpha, wo[2])), float(ggx_lambda(alpha, wi[2]))
        f_cos = d / (1.0 + lam_o + lam_i) * schlick(f0, float(wo @ h)) / (4.0 * wo[2])
        pdf = d / (1.0 + lam_o) / (4.0 * wo[2])
        fr, _, _, eval_pdf = metal_eval(alpha, f0, f0, f0, *wo, *wi)
        assert fr == pytest.approx(f_cos, rel=FORMULA_RTOL)
        assert eval_pdf == pytest.approx(pdf, rel=FORMULA_RTOL)


# ---- 10. robustness: non-finite samples and the clamp ----

def flat_quad(x0, x1, y0, y1, z):
    """A rectangle in the plane z facing +z (counter-clockwise seen from +z)."""
    return np.array([[x0, y0, z], [x1, y0, z], [x1, y1, z], [x0, y1, z]]), np.array([[0, 1, 2], [0, 2, 3]])


@pytest.mark.filterwarnings("ignore:invalid value encountered in divide:RuntimeWarning")  # inf / inf power
@pytest.mark.parametrize("bad", (np.inf, np.nan))
def test_nonfinite_samples_counted_and_dropped(make_scene, bad):
    """A material row with non-finite emission (built by hand: the scene parser refuses it) makes every
    sample whose camera ray meets it non-finite. Each such sample is counted in
    stats["render"]["nonfinite_samples"] and contributes 0: the image equals the one where that emitter
    is black, and the count equals the number of samples that hit it (measured with emission 1; same seed,
    so the same camera rays). IEEE 754: inf and nan propagate through the path's products."""
    camera = {"position": (0.0, 0.0, 3.0), "look_at": (0.0, 0.0, 0.0), "up": (0.0, 1.0, 0.0), "fov": 40.0}
    left, right = flat_quad(-0.9, 0.0, -0.5, 0.5, 0.0), flat_quad(0.1, 0.8, -0.7, 0.3, 0.0)
    spp, size = 8, 24

    def run(left_emission):
        parts = [(*left, "emitter", (1.0, 1.0, 1.0)), (*right, "emitter", (0.5, 1.0, 2.0))]
        scene = make_scene(parts, camera, width=size, height=size, samples=spp, bounces=0, seed=4)
        params = scene.material_params.copy()
        params[0, M_EMISSION:M_EMISSION + 3] = left_emission
        return tracer.render(scene._replace(material_params=params), threads=1)

    broken, black, unit = run(bad), run(0.0), run(1.0)
    assert np.all(np.isfinite(broken.radiance))
    np.testing.assert_array_equal(broken.radiance, black.radiance)
    assert black.stats["render"]["nonfinite_samples"] == 0
    hits_on_left = unit.radiance[..., 0].astype(np.float64) * spp - black.radiance[..., 0] * spp
    assert hits_on_left.sum() > 100
    assert broken.stats["render"]["nonfinite_samples"] == round(hits_on_left.sum())


HUGE_SCENE = """
[camera]
position = [0.0, 1.0, 1.4]
look_at = [0.0, 0.8, 0.0]
fov = 65.0

[materials.wall]
type = "diffuse"
albedo = [0.8, 0.8, 0.8]

[materials.lamp]
type = "emitter"
radiance = [1e30, 1e30, 1e30]

[[objects]]
shape = "box"
center = [0.0, 1.0, 0.0]
size = [3.0, 2.0, 3.0]
material = "wall"

[[objects]]
shape = "rect"
center = [0.0, 1.999, 0.0]
size = [0.02, 0.02]
normal = [0.0, -1.0, 0.0]
material = "lamp"
"""


def test_largest_emission_stays_finite(tmp_path):
    """The largest radiance the scene format accepts (1e30, tracer/scene/toml.py) in a room lit by a
    tiny lamp close to the ceiling, four bounces: no inf or nan in any channel."""
    scene = load(tmp_path, HUGE_SCENE)
    result = tracer.render(scene, samples=8, width=24, height=16, bounces=4, seed=2, threads=1)
    for name, channel in result.channels.items():
        if name != "depth.Z":
            assert np.all(np.isfinite(channel)), name
    assert result.radiance.max() > 1e25


THIN_MEDIUM_SCENE = """
[camera]
position = [0.0, 0.0, 3.0]
look_at = [0.0, 0.0, 0.0]
fov = 0.001

[materials.thin]
type = "glass"
ior = 5e-5

[materials.lamp]
type = "emitter"
radiance = [1e30, 1e30, 1e30]

[[objects]]
shape = "box"
center = [0.0, 0.0, 0.0]
size = [1.0, 1.0, 0.2]
material = "thin"

[[objects]]
shape = "rect"
center = [0.0, 0.0, 0.0]
size = [0.5, 0.5]
normal = [0.0, 0.0, 1.0]
material = "lamp"
"""


def test_sample_beyond_float32_never_reaches_image(tmp_path):
    """Valid input whose samples exceed the float32 range: a lamp of radiance 1e30 inside glass of index
    5e-5 (both within the parser's limits), seen at normal incidence. A transmitted sample carries
    Le (n_i / n_t)^2 = 1e30 / (5e-5)^2 = 4e38 > 3.4e38, the largest float32 (IEEE 754 binary32), while
    the expected radiance Le (1 - R) / n^2 ~ 8e34 (R from Hecht eq. 4.47) is representable. Such a
    sample must be dropped (and counted) or kept finite: no inf may reach the image."""
    scene = load(tmp_path, THIN_MEDIUM_SCENE)
    result = tracer.render(scene, samples=16, width=32, height=32, bounces=4, seed=1, threads=1)
    assert np.all(np.isfinite(result.radiance)), (
        f"{np.count_nonzero(~np.isfinite(result.radiance))} non-finite values in the image; "
        f"nonfinite_samples = {result.stats['render']['nonfinite_samples']}")


FIREFLY_SCENE = """
[camera]
position = [0.0, 1.0, 1.4]
look_at = [0.0, 0.8, 0.0]
fov = 65.0

[materials.wall]
type = "diffuse"
albedo = [0.8, 0.75, 0.7]

[materials.steel]
type = "metal"
color = [0.9, 0.9, 0.9]
roughness = 0.15

[materials.lamp]
type = "emitter"
radiance = [4000.0, 4000.0, 4000.0]

[[objects]]
shape = "box"
center = [0.0, 1.0, 0.0]
size = [3.0, 2.0, 3.0]
material = "wall"

[[objects]]
shape = "sphere"
center = [0.3, 0.4, -0.3]
radius = 0.4
subdivisions = 2
material = "steel"

[[objects]]
shape = "rect"
center = [-0.6, 1.98, -0.4]
size = [0.05, 0.05]
normal = [0.0, -1.0, 0.0]
material = "lamp"
"""
CLAMP_LIMIT = 2.0


def test_clamp_never_brightens_and_tames_fireflies(tmp_path):
    """--clamp caps each indirect contribution (biased, opt-in): with the same seed every contribution
    is the same or smaller and all are >= 0, and IEEE 754 rounding is monotonic, so no pixel may get
    brighter; a small bright lamp's fireflies lose their peak; and direct light (bounces = 1) is left
    exactly as it was, since the clamp acts on indirect light only (issue 5)."""
    scene = load(tmp_path, FIREFLY_SCENE)
    accel = tracer.build_accel(scene.vertices, scene.faces, kind="bvh")
    options = {"accel": accel, "samples": 8, "width": 24, "height": 16, "seed": 9, "threads": 1}
    free = tracer.render(scene, bounces=4, **options).radiance
    clamped = tracer.render(scene, bounces=4, clamp=CLAMP_LIMIT, **options)
    assert clamped.stats["render"]["clamp"] == CLAMP_LIMIT
    assert np.all(clamped.radiance <= free)
    assert clamped.radiance.max() < 0.5 * free.max()
    direct = tracer.render(scene, bounces=1, **options).radiance
    np.testing.assert_array_equal(tracer.render(scene, bounces=1, clamp=CLAMP_LIMIT, **options).radiance,
                                  direct)

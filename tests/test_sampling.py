"""Sampling: GGX importance sampling, multiple importance sampling, convergence, Sobol' points, thin lens.

Sources, named again beside each check:
- GGX distribution D (Walter, Marschner, Li & Torrance 2007, "Microfacet models for refraction through
  rough surfaces", EGSR, eq. 33) and its normalisation, the integral of D(m) cos theta_m over the
  hemisphere = 1 (ibid., eq. 4).
- Smith Lambda of GGX and the projected-area identity of the visible microfacets (Heitz 2014,
  "Understanding the masking-shadowing function in microfacet-based BRDFs", JCGT 3(2), eq. 72 and
  section 3; equation numbers from memory).
- The pdf of the reflected direction under visible-normal sampling, G1(o) D(h) / (4 cos_o) (Heitz 2018,
  "Sampling the GGX distribution of visible normals", JCGT 7(4), eq. 17 with the reflection Jacobian
  1 / (4 |o.h|) of Walter et al. 2007, eq. 14); Pearson's chi-square test via scipy.stats.chisquare.
- The power heuristic (Veach & Guibas 1995, "Optimally combining sampling techniques for Monte Carlo
  rendering", SIGGRAPH '95, eq. 9 and section 3).
- Monte Carlo error falls like N^(-1/2) (central limit theorem), quasi-Monte Carlo with scrambled nets
  at least as fast (Owen 1997, "Scrambled net variance for integrals of smooth functions", Ann. Stat.).
- Sobol' points: scipy.stats.qmc.Sobol (reference library; Joe & Kuo direction numbers, Gray-code
  order after Antonov & Saleev 1979, "An economic method of computing LP-tau sequences", from memory).
  Owen scrambling keeps the (t, m, s)-net structure (Owen 1995, "Randomly permuted (t,m,s)-nets and
  (t,s)-sequences"; Burley 2020, "Practical hash-based Owen scrambling", JCGT 9(4)); Sobol's first two
  dimensions form a (0, 2)-sequence in base 2 (Niederreiter 1992, "Random number generation and
  quasi-Monte Carlo methods", ch. 4; common knowledge).
- Thin lens: circle of confusion from similar triangles (Pharr, Jakob & Humphreys, "Physically Based
  Rendering", 3rd ed., section 6.2.3). The variance of a uniform disk of diameter c projected on a line
  is c^2 / 16 (the semicircle law), and variances of independent blurs add.
"""
import math

import numpy as np
import pytest
from scipy import integrate, stats
from scipy.stats import qmc

import tracer
from tracer.render._bsdf import ggx_d, ggx_lambda, metal_eval, metal_sample
from tracer.render._integrator import _power_heuristic
from tracer.render.rng import _sobol, scrambled_sobol4

# ---- tolerances, one per kind of check ----
# scipy's adaptive quadrature of a smooth integrand (split at its kinks).
QUADRATURE_RTOL = 1e-8
# One quantity by two float64 routes.
FORMULA_RTOL = 1e-9
# Pearson's chi-square test: reject a histogram below this p-value.
CHI_SQUARE_P = 1e-3
# Pearson's test needs at least this many expected counts per bin (common practice: 5).
MIN_EXPECTED = 5.0
# Gauss-Legendre quadrature of the pdf over the histogram's bins (16 x 16 nodes per bin, the pdf smooth
# inside each; 1e-8 reached while writing this test): the bin probabilities must add up to 1 within this.
BIN_QUADRATURE_ATOL = 1e-6
# Monte Carlo means within this many standard errors (common practice: 3 sigma), with the standard error
# itself below MAX_RELATIVE_ERROR of the value so that the check has teeth.
STANDARD_ERRORS = 3.0
MAX_RELATIVE_ERROR = 0.01
# Convergence: the log-log slope of RMS error against samples per pixel (-0.5 for plain Monte Carlo).
SLOPE_LIMIT = -0.45
# Thin lens, a coarse geometric check: the measured blur width against the prediction.
BLUR_RTOL = 0.05
# Results exact up to float32 storage of per-sample radiance (2^-24 = 6e-8, IEEE 754 binary32).
FLOAT_RTOL = 1e-6


def load(tmp_path, text: str, name: str = "scene"):
    path = tmp_path / f"{name}.toml"
    path.write_text(text)
    return tracer.load_scene(path)


# ---- GGX formulas written out here ----

def heitz_pdf(alpha: float, wo: np.ndarray, wi: np.ndarray) -> np.ndarray:
    """pdf (solid angle) of the reflected direction under visible-normal sampling, over the whole sphere:
    G1(o) D(h) / (4 cos_o), h = (o + i) / |o + i| (Heitz 2018, eq. 17, with Walter 2007, eq. 14);
    D of Walter 2007, eq. 33; G1 = 1 / (1 + Lambda(o)), Lambda of Heitz 2014, eq. 72."""
    h = wo + wi
    h = h / np.linalg.norm(h, axis=-1, keepdims=True)
    cos_h = h[..., 2]
    a2 = alpha * alpha
    d = np.where(cos_h > 0.0, a2 / (math.pi * (cos_h * cos_h * (a2 - 1.0) + 1.0) ** 2), 0.0)
    tan2_o = (1.0 - wo[2] ** 2) / wo[2] ** 2
    g1 = 1.0 / (1.0 + 0.5 * (-1.0 + math.sqrt(1.0 + a2 * tan2_o)))
    return g1 * d / (4.0 * wo[2])


def test_ggx_distribution_is_normalised():
    """Integral of D(m) cos theta_m over the hemisphere = 1 (Walter et al. 2007, eq. 4), for the kernel's
    D, from nearly mirror-like to alpha = 1."""
    for alpha in (0.0025, 0.04, 0.25, 0.64, 1.0):
        value, _ = integrate.quad(lambda t, a=alpha: 2.0 * math.pi * ggx_d(a, math.cos(t)) * math.cos(t)
                                  * math.sin(t), 0.0, 0.5 * math.pi, points=(0.5 * alpha, alpha, 2.0 * alpha),
                                  limit=200, epsabs=0.0, epsrel=1e-11)
        assert value == pytest.approx(1.0, rel=QUADRATURE_RTOL), alpha


def test_ggx_masking_keeps_projected_area():
    """The visible microfacets project onto the view plane exactly as the macro surface does:
    integral of G1(o) max(0, o.m) D(m) d omega_m = cos theta_o (Heitz 2014, section 3), with the kernel's
    D and Lambda; this ties Lambda to D."""
    for alpha in (0.04, 0.25, 1.0):
        for cos_o in (1.0, 0.6, 0.15):
            sin_o = math.sqrt(1.0 - cos_o * cos_o)
            g1 = 1.0 / (1.0 + ggx_lambda(alpha, cos_o))

            def integrand(phi, theta, a=alpha, c=cos_o, s=sin_o, g=g1):
                o_dot_m = math.sin(theta) * math.cos(phi) * s + math.cos(theta) * c
                return 2.0 * g * o_dot_m * ggx_d(a, math.cos(theta)) * math.sin(theta)

            def phi_limit(theta, c=cos_o, s=sin_o):
                """o.m > 0 for phi below this (the integrand's kink)."""
                if s == 0.0 or theta == 0.0:
                    return math.pi
                return math.acos(min(1.0, max(-1.0, -math.cos(theta) * c / (math.sin(theta) * s))))

            value, _ = integrate.quad(lambda t, f=integrand, lim=phi_limit: integrate.quad(
                f, 0.0, lim(t), args=(t,), epsabs=0.0, epsrel=1e-11)[0], 0.0, 0.5 * math.pi,
                points=(0.5 * alpha, alpha, 2.0 * alpha), limit=200, epsabs=0.0, epsrel=1e-10)
            assert value == pytest.approx(cos_o, rel=QUADRATURE_RTOL), (alpha, cos_o)


# ---- 5. chi-square test of metal_sample's directions ----

CHI_SQUARE_SAMPLES = 100000
CHI_SQUARE_CASES = ((0.04, 0.9), (0.09, 0.5), (0.25, 0.15), (0.49, 1.0), (1.0, 0.6))
LOBE_WIDTHS = (0.25, 0.5, 0.75, 1.0, 1.5, 2.0, 3.0, 5.0, 10.0)   # tan(angle / 2) / alpha about the mirror
UNIFORM_AZIMUTH_BINS = 12
NODES_PER_BIN = 16


def sphere_bins(alpha: float, cos_o: float):
    """(theta, phi) bin edges over the whole sphere of directions, wo at phi = 0: finer about the mirror
    direction (theta_o, pi), scaled to the lobe (the reflected direction turns by about twice the
    microfacet normal). The pdf is smooth inside every bin: it drops to 0 where the half vector goes
    under the horizon, (o + i).z = 0, i.e. at theta = pi - theta_o, which is an edge (as is the horizon),
    and it has no limit at i = -o, (pi - theta_o, pi), which is a corner."""
    theta_o = math.acos(cos_o)
    spread = np.array([2.0 * math.atan(alpha * q) for q in LOBE_WIDTHS])
    theta = np.concatenate([[0.0, 0.5 * math.pi, math.pi - theta_o, math.pi], theta_o - spread,
                            theta_o + spread])
    theta = np.unique(theta[(theta >= 0.0) & (theta <= math.pi)])
    if math.sin(theta_o) < 0.1:                    # the lobe sits on the pole: no preferred azimuth
        phi = np.linspace(0.0, 2.0 * math.pi, UNIFORM_AZIMUTH_BINS + 1)
    else:
        phi = np.concatenate([[0.0, math.pi, 2.0 * math.pi], math.pi - spread / math.sin(theta_o),
                              math.pi + spread / math.sin(theta_o)])
        phi = np.unique(phi[(phi >= 0.0) & (phi <= 2.0 * math.pi)])
    keep = np.diff(theta, prepend=-1.0) > 1e-9
    return theta[keep], phi


@pytest.mark.parametrize(("alpha", "cos_o"), CHI_SQUARE_CASES)
def test_ggx_sampling_histogram(alpha, cos_o):
    """Pearson's chi-square test (scipy.stats.chisquare) of directions from metal_sample against the pdf
    G1(o) D(h) / (4 cos_o) written in this test (Heitz 2018), over (theta, phi) bins covering the whole
    sphere (directions below the horizon are sampled too, then absorbed); the pdf integrates to 1 over the
    bins; metal_sample's and metal_eval's pdfs equal it pointwise."""
    wo = np.array([math.sqrt(1.0 - cos_o * cos_o), 0.0, cos_o])
    rng = np.random.default_rng(1995)
    samples = np.array([metal_sample(alpha, 1.0, 1.0, 1.0, *wo, u1, u2)
                        for u1, u2 in rng.random((CHI_SQUARE_SAMPLES, 2))])
    directions = samples[:, 0:3]
    above = directions[:, 2] > 0.0
    np.testing.assert_allclose(samples[above, 6], heitz_pdf(alpha, wo, directions[above]), rtol=FORMULA_RTOL)

    theta_edges, phi_edges = sphere_bins(alpha, cos_o)
    theta = np.arccos(np.clip(directions[:, 2], -1.0, 1.0))
    phi = np.arctan2(directions[:, 1], directions[:, 0]) % (2.0 * math.pi)
    observed, _, _ = np.histogram2d(theta, phi, bins=(theta_edges, phi_edges))

    # Expected probability of each bin: Gauss-Legendre over (theta, phi), d omega = sin(theta).
    x, w = np.polynomial.legendre.leggauss(NODES_PER_BIN)
    probability = np.zeros_like(observed)
    for i, (t0, t1) in enumerate(zip(theta_edges[:-1], theta_edges[1:], strict=True)):
        for j, (p0, p1) in enumerate(zip(phi_edges[:-1], phi_edges[1:], strict=True)):
            t, p = np.meshgrid(t0 + (t1 - t0) * 0.5 * (x + 1.0), p0 + (p1 - p0) * 0.5 * (x + 1.0),
                               indexing="ij")
            wi = np.stack([np.sin(t) * np.cos(p), np.sin(t) * np.sin(p), np.cos(t)], axis=-1)
            weight = np.outer(w, w) * 0.25 * (t1 - t0) * (p1 - p0)
            probability[i, j] = np.sum(heitz_pdf(alpha, wo, wi) * np.sin(t) * weight)
            if t1 <= 0.5 * math.pi and j % 4 == 0:
                evaluated = np.array([metal_eval(alpha, 1.0, 1.0, 1.0, *wo, *d)[3] for d in wi[0]])
                np.testing.assert_allclose(evaluated, heitz_pdf(alpha, wo, wi[0]), rtol=FORMULA_RTOL)
    assert probability.sum() == pytest.approx(1.0, abs=BIN_QUADRATURE_ATOL)

    expected = probability.ravel() * CHI_SQUARE_SAMPLES / probability.sum()
    observed = observed.ravel()
    impossible = expected == 0.0                    # the cap where the half vector is under the horizon
    assert observed[impossible].sum() == 0
    expected, observed = expected[~impossible], observed[~impossible]
    small = expected < MIN_EXPECTED                 # pooled into one bin (common practice)
    if np.any(small):
        expected = np.append(expected[~small], expected[small].sum())
        observed = np.append(observed[~small], observed[small].sum())
    assert expected.size > 40                       # enough bins for the test to have power
    p_value = stats.chisquare(observed, expected).pvalue
    assert p_value > CHI_SQUARE_P, f"alpha {alpha}, cos_o {cos_o}: chi-square p = {p_value:.2e}"


# ---- 6. multiple importance sampling ----

def test_power_heuristic_weights():
    """Veach & Guibas 1995, eq. 9 with beta = 2: w_a = p_a^2 / (p_a^2 + p_b^2); the two strategies'
    weights for one direction add up to 1 (their condition for an unbiased combination), and a strategy
    that cannot produce the direction (pdf 0) gets weight 0."""
    rng = np.random.default_rng(9)
    for pdf_a, pdf_b in 10.0 ** rng.uniform(-6.0, 6.0, size=(200, 2)):
        w_a, w_b = _power_heuristic(pdf_a, pdf_b), _power_heuristic(pdf_b, pdf_a)
        assert w_a == pytest.approx(pdf_a**2 / (pdf_a**2 + pdf_b**2), rel=FORMULA_RTOL)
        assert w_a + w_b == pytest.approx(1.0, rel=FORMULA_RTOL)
    assert _power_heuristic(0.0, 3.0) == 0.0
    assert _power_heuristic(3.0, 0.0) == 1.0
    assert _power_heuristic(2.0, 2.0) == 0.5


GLOSSY_SCENE = """
[camera]
position = {camera}
look_at = [0.13, 0.0, 0.07]
up = [0.0, 0.0, 1.0]
fov = 0.05

[materials.steel]
type = "metal"
color = [1.0, 1.0, 1.0]
roughness = {roughness}

[materials.lamp]
type = "emitter"
radiance = [{radiance}, {radiance}, {radiance}]

[[objects]]
shape = "rect"
center = [0.0, 0.0, 0.0]
size = [4.0, 4.0]
normal = [0.0, 1.0, 0.0]
material = "steel"

[[objects]]
shape = "rect"
center = {lamp_center}
size = [{lamp_size}, {lamp_size}]
normal = {lamp_normal}
material = "lamp"
"""
GLOSSY_POINT = np.array([0.13, 0.0, 0.07])
GLOSSY_VIEW = math.radians(45.0)
LAMP_DISTANCE = 2.0
MIS_PIXELS = 64            # 64 x 64 pixels, one sample each: 4096 independent MIS estimates
ESTIMATOR_SAMPLES = 60000  # for the single-strategy estimators written in this test


class GlossyLamp:
    """A metal plate (y = 0, facing +y) lit by a square lamp centred on the mirror direction of the view,
    facing the plate point, distance LAMP_DISTANCE; the camera sees only the plate point."""

    def __init__(self, roughness: float, lamp_size: float, radiance: float):
        self.alpha = float(np.float32(roughness)) ** 2
        self.radiance = radiance
        self.size = lamp_size
        self.wo = np.array([math.sin(GLOSSY_VIEW), math.cos(GLOSSY_VIEW), 0.0])   # world, toward camera
        mirror = np.array([-self.wo[0], self.wo[1], 0.0])
        self.centre = GLOSSY_POINT + LAMP_DISTANCE * mirror
        self.normal = -mirror
        # The parser's frame of a rect: tangent = world +X projected into the plane, then normal x tangent
        # (INTERFACE.md, "Scene file").
        tangent = np.array([1.0, 0.0, 0.0]) - self.normal[0] * self.normal
        self.tangent = tangent / np.linalg.norm(tangent)
        self.bitangent = np.cross(self.normal, self.tangent)
        self.roughness = roughness

    def scene_text(self) -> str:
        def vec(v):
            return "[" + ", ".join(f"{x:.12f}" for x in v) + "]"
        return GLOSSY_SCENE.format(camera=vec(GLOSSY_POINT + 3.0 * self.wo), roughness=self.roughness,
                                   radiance=self.radiance, lamp_center=vec(self.centre),
                                   lamp_size=self.size, lamp_normal=vec(self.normal))

    @staticmethod
    def local(v: np.ndarray) -> np.ndarray:
        """World -> the plate's frame (x, z, y): z along the plate normal +y (isotropic BRDF)."""
        return np.stack([v[..., 0], v[..., 2], v[..., 1]], axis=-1)

    def f_cos(self, wi_world: np.ndarray) -> np.ndarray:
        """f cos_i (colour 1, so F = 1) from metal_eval, per direction."""
        wo = self.local(self.wo)
        return np.array([metal_eval(self.alpha, 1.0, 1.0, 1.0, *wo, *wi)[0] for wi in self.local(wi_world)])

    def lamp_points(self, a: np.ndarray, b: np.ndarray) -> np.ndarray:
        return (self.centre + ((a - 0.5) * self.size)[..., None] * self.tangent
                + ((b - 0.5) * self.size)[..., None] * self.bitangent)

    def radiance_by_quadrature(self, nodes: int = 96) -> float:
        """L = integral over the lamp of f cos_i Le cos_l / d^2 dA (the area form of the reflection
        integral), Gauss-Legendre in both lamp coordinates."""
        x, w = np.polynomial.legendre.leggauss(nodes)
        a, b = np.meshgrid(0.5 * (x + 1.0), 0.5 * (x + 1.0), indexing="ij")
        to_lamp = self.lamp_points(a, b) - GLOSSY_POINT
        dist = np.linalg.norm(to_lamp, axis=-1)
        wi = to_lamp / dist[..., None]
        cos_l = -(wi @ self.normal)
        value = self.f_cos(wi.reshape(-1, 3)).reshape(a.shape) * cos_l / dist**2
        return float(np.sum(value * np.outer(w, w) * 0.25) * self.size**2 * self.radiance)

    def light_sampling(self, rng) -> np.ndarray:
        """One-sample estimates with a uniform point on the lamp: f cos Le cos_l A / d^2."""
        a, b = rng.random(ESTIMATOR_SAMPLES), rng.random(ESTIMATOR_SAMPLES)
        to_lamp = self.lamp_points(a, b) - GLOSSY_POINT
        dist = np.linalg.norm(to_lamp, axis=-1)
        wi = to_lamp / dist[:, None]
        return self.f_cos(wi) * self.radiance * -(wi @ self.normal) * self.size**2 / dist**2

    def bsdf_sampling(self, rng) -> np.ndarray:
        """One-sample estimates with metal_sample's direction: its weight x Le where the ray meets the
        lamp's front, else 0."""
        wo = self.local(self.wo)
        samples = np.array([metal_sample(self.alpha, 1.0, 1.0, 1.0, *wo, u1, u2)
                            for u1, u2 in rng.random((ESTIMATOR_SAMPLES, 2))])
        local = samples[:, 0:3]
        wi = np.stack([local[:, 0], local[:, 2], local[:, 1]], axis=-1)       # back to world
        facing = wi @ self.normal
        t = ((self.centre - GLOSSY_POINT) @ self.normal) / np.where(facing < 0.0, facing, -1.0)
        hit = GLOSSY_POINT + t[:, None] * wi - self.centre
        inside = ((facing < 0.0) & (np.abs(hit @ self.tangent) <= 0.5 * self.size)
                  & (np.abs(hit @ self.bitangent) <= 0.5 * self.size))
        return np.where(inside, samples[:, 3] * self.radiance, 0.0)


@pytest.mark.parametrize(("roughness", "lamp_size", "weak"), ((0.2, 0.05, "bsdf"), (0.1, 1.2, "light")))
def test_mis_unbiased_and_lower_variance(tmp_path, roughness, lamp_size, weak):
    """MIS leaves the expected value unchanged and removes the weak strategy's variance (Veach & Guibas
    1995, section 3). Glossy metal (roughness 0.2) under a small bright lamp: BSDF sampling rarely hits
    the lamp; a sharper metal (roughness 0.1) under a large lamp: uniform points on the lamp rarely fall
    in the lobe. The renderer (one light and one BSDF sample per pixel, power heuristic) is compared with
    one-strategy estimators written here. All three means must match the reflection integral computed by
    quadrature (3 standard errors); the renderer's variance must be below half of the weak strategy's at
    equal cost (two samples of it), and within Veach & Guibas' bound of the strong strategy's."""
    setup = GlossyLamp(roughness, lamp_size, 100.0)
    scene = load(tmp_path, setup.scene_text())
    expected = setup.radiance_by_quadrature()
    assert expected > 0.0
    result = tracer.render(scene, samples=1, width=MIS_PIXELS, height=MIS_PIXELS, bounces=1, seed=21,
                           threads=1)
    rng = np.random.default_rng(1995)
    estimates = {"mis": result.radiance[..., 0].astype(np.float64).ravel(),
                 "light": setup.light_sampling(rng), "bsdf": setup.bsdf_sampling(rng)}
    variance = {}
    for name, values in estimates.items():
        standard_error = values.std(ddof=1) / math.sqrt(values.size)
        if name != weak:                            # the weak strategy is noisy by design
            assert standard_error < MAX_RELATIVE_ERROR * expected, name
        assert abs(values.mean() - expected) < STANDARD_ERRORS * standard_error, (
            f"{name}: mean {values.mean():.4f}, reflection integral {expected:.4f} (se {standard_error:.2e})")
        variance[name] = values.var(ddof=1)
    strong = "light" if weak == "bsdf" else "bsdf"
    # Equal cost: MIS traces one light and one BSDF sample, so compare with two samples of one strategy.
    drop = variance[weak] / 2.0 / variance["mis"]
    assert drop > 2.0, f"variance drop against {weak} sampling only: {drop:.2f}"
    # Never much worse than the better strategy: Veach & Guibas 1995, Theorem 1 (proved for the balance
    # heuristic, one sample per strategy): V_mis <= V_best / 2 + (1 - 1/2) mu^2.
    assert variance["mis"] <= variance[strong] / 2.0 + 0.5 * expected**2


# ---- 7. convergence ----

ROOM_SCENE = """
[camera]
position = [0.0, 1.0, 1.45]
look_at = [0.0, 0.9, 0.0]
fov = 65.0

[materials.wall]
type = "diffuse"
albedo = [0.75, 0.7, 0.6]

[materials.clay]
type = "diffuse"
albedo = [0.3, 0.5, 0.7]

[materials.lamp]
type = "emitter"
radiance = [8.0, 8.0, 8.0]

[[objects]]
shape = "box"
center = [0.0, 1.0, 0.0]
size = [3.0, 2.0, 3.0]
material = "wall"

[[objects]]
shape = "rect"
center = [0.0, 1.98, 0.0]
size = [0.8, 0.8]
normal = [0.0, -1.0, 0.0]
material = "lamp"

[[objects]]
shape = "sphere"
center = [0.4, 0.45, -0.2]
radius = 0.45
subdivisions = 2
material = "clay"
"""
REFERENCE_SAMPLES = 1024
SAMPLE_COUNTS = (4, 16, 64, 256)


def test_rms_error_converges(tmp_path):
    """RMS error against a 1024-sample reference (another seed, so an independent estimate) falls at
    least like N^(-1/2) (Monte Carlo; scrambled Sobol' points may do better, Owen 1997): the
    least-squares slope of log RMSE against log N over 4..256 samples is <= SLOPE_LIMIT. The reference's
    own error adds in quadrature and only flattens the measured slope, so the check is conservative."""
    scene = load(tmp_path, ROOM_SCENE)
    accel = tracer.build_accel(scene.vertices, scene.faces, kind="bvh")
    options = {"accel": accel, "width": 16, "height": 12, "bounces": 3, "threads": 1}
    reference = tracer.render(scene, samples=REFERENCE_SAMPLES, seed=101, **options).radiance
    reference = reference.astype(np.float64)
    assert reference.mean() > 0.05
    errors = []
    for samples in SAMPLE_COUNTS:
        image = tracer.render(scene, samples=samples, seed=7, **options).radiance.astype(np.float64)
        errors.append(math.sqrt(np.mean((image - reference) ** 2)))
    slope = np.polyfit(np.log(SAMPLE_COUNTS), np.log(errors), 1)[0]
    assert slope <= SLOPE_LIMIT, f"RMSE {errors} -> slope {slope:.3f}"


# ---- 8. Sobol' points ----

LOG2_POINTS = 10


def unscrambled_points(count: int) -> np.ndarray:
    """The first `count` points of _sobol in dimensions 0-3, as fractions (32-bit integers / 2^32)."""
    return np.array([[_sobol(np.uint64(i), d) for d in range(4)] for i in range(count)], np.float64) / 2.0**32


def test_sobol_points_match_scipy():
    """_sobol's first 2^k points equal scipy.stats.qmc.Sobol(4, scramble=False)'s as sets (reference
    library, Joe & Kuo direction numbers), and point j of scipy's Gray-code order is our point
    j xor (j >> 1) (Antonov & Saleev 1979)."""
    ours = unscrambled_points(2**LOG2_POINTS)
    reference = qmc.Sobol(d=4, scramble=False).random_base2(LOG2_POINTS)
    order = np.lexsort(ours.T[::-1])
    np.testing.assert_array_equal(ours[order], reference[np.lexsort(reference.T[::-1])])
    j = np.arange(2**LOG2_POINTS)
    np.testing.assert_array_equal(ours[j ^ (j >> 1)], reference)


def scrambled(pixel_key: int, group: int, count: int) -> np.ndarray:
    """(count, 4) scrambled points 0..count-1 of one pixel key and dimension group (the kernel's types:
    uint64 key, integer sample and group)."""
    return np.array([scrambled_sobol4(np.uint64(pixel_key), sample, group) for sample in range(count)])


PIXEL_KEYS = (0, 1, 0x9E3779B97F4A7C15, 2**64 - 1)


@pytest.mark.parametrize("pixel_key", PIXEL_KEYS)
def test_scrambled_sobol_is_stratified(pixel_key):
    """Owen scrambling keeps the net structure (Owen 1995; Burley 2020, section 3): for every k <= 10 the
    first 2^k points put exactly one point in each interval [j/2^k, (j+1)/2^k) of every dimension (each
    dimension of Sobol' is a (0, 1)-sequence), and dimensions 0-1 put exactly one point in every
    elementary box of area 2^-k ((0, 2)-sequence, Niederreiter 1992). Values lie in [0, 1) and are a
    pure function of (key, sample, group)."""
    for group in (0, 1, 7):
        points = scrambled(pixel_key, group, 2**LOG2_POINTS)
        assert np.all((points >= 0.0) & (points < 1.0))
        np.testing.assert_array_equal(points, scrambled(pixel_key, group, 2**LOG2_POINTS))
        for k in range(LOG2_POINTS + 1):
            first = points[: 2**k]
            cells = np.floor(first * 2**k).astype(np.int64)
            for dim in range(4):
                assert np.array_equal(np.sort(cells[:, dim]), np.arange(2**k)), (group, k, dim)
            for a in range(k + 1):
                boxes = (np.floor(first[:, 0] * 2**a).astype(np.int64) * 2 ** (k - a)
                         + np.floor(first[:, 1] * 2 ** (k - a)).astype(np.int64))
                assert np.array_equal(np.sort(boxes), np.arange(2**k)), (group, k, a)


def test_scrambled_sobol_differs_between_pixels_and_groups():
    """Each pixel key and each dimension group gets its own scramble (Burley 2020, section 4): no two of
    these sequences share a point, and they are no copy of the unscrambled points."""
    count = 64
    sequences = [scrambled(key, group, count) for key in PIXEL_KEYS for group in (0, 1, 2)]
    sequences.append(unscrambled_points(count))
    for i, first in enumerate(sequences):
        for second in sequences[i + 1:]:
            assert not np.any(np.all(first[:, None, :] == second[None, :, :], axis=-1))


# ---- 9. thin lens ----

LENS_SCENE = """
[camera]
position = [0.0, 0.0, 0.0]
look_at = [0.0, 0.0, -1.0]
fov = {fov}
aperture = {aperture}
focus_distance = {focus}

[materials.lamp]
type = "emitter"
radiance = [1.0, 1.0, 1.0]

[[objects]]
shape = "rect"
center = [{near_x}, 0.0, {near_z}]
size = [{near_width}, 4.0]
normal = [0.0, 0.0, 1.0]
material = "lamp"

[[objects]]
shape = "rect"
center = [{far_x}, 0.0, {far_z}]
size = [{far_width}, 4.0]
normal = [0.0, 0.0, 1.0]
material = "lamp"
"""
LENS_WIDTH, LENS_HEIGHT = 96, 8
FOCUS = 2.0
FAR = 6.0
APERTURE = 0.1
LENS_FOV = 1.2732          # degrees: one pixel is 2 FOCUS tan(fov/2) / LENS_HEIGHT = 5.6e-3 at the focus


def line_widths(radiance: np.ndarray):
    """(centre, standard deviation) in pixels of each half-image's column profile, summed over rows."""
    profile = radiance[..., 0].astype(np.float64).sum(axis=0)
    columns = np.arange(LENS_WIDTH) + 0.5
    out = []
    for half in (slice(0, LENS_WIDTH // 2), slice(LENS_WIDTH // 2, LENS_WIDTH)):
        weight, x = profile[half], columns[half]
        centre = np.sum(weight * x) / weight.sum()
        out.append((centre, math.sqrt(np.sum(weight * (x - centre) ** 2) / weight.sum())))
    return out


def test_thin_lens_focus_and_blur(tmp_path):
    """A thin vertical line lamp in the plane of focus and one far behind it. With a lens of diameter A
    the line at the focus distance f stays exactly as sharp as through a pinhole; the one at distance d
    spreads over a circle of confusion of diameter A |d - f| / d in the plane of focus (PBRT 3rd ed.,
    6.2.3), i.e. c = A |d - f| / d * H / (2 f tan(fov/2)) pixels. Its profile (a uniform disk projected on
    a line: variance c^2 / 16) widens the pinhole profile in quadrature."""
    pixel = 2.0 * FOCUS * math.tan(math.radians(LENS_FOV) / 2.0) / LENS_HEIGHT     # at the focus distance
    geometry = {"fov": LENS_FOV, "focus": FOCUS, "near_x": -0.12, "near_z": -FOCUS, "near_width": pixel,
                "far_x": 0.12 * FAR / FOCUS, "far_z": -FAR, "far_width": pixel * FAR / FOCUS}
    images = {}
    for aperture in (0.0, APERTURE):
        scene = load(tmp_path, LENS_SCENE.format(aperture=aperture, **geometry), f"lens-{aperture:g}")
        images[aperture] = tracer.render(scene, samples=128, width=LENS_WIDTH, height=LENS_HEIGHT,
                                         bounces=0, seed=2, threads=1).radiance
    near_pinhole, far_pinhole = line_widths(images[0.0])
    near_lens, far_lens = line_widths(images[APERTURE])
    # In focus: the same image (every lens ray meets the plane of focus where the pinhole ray does).
    assert near_lens[1] == pytest.approx(near_pinhole[1], rel=FLOAT_RTOL)
    assert near_lens[0] == pytest.approx(near_pinhole[0], rel=FLOAT_RTOL)
    # Out of focus: the circle of confusion.
    confusion = APERTURE * abs(FAR - FOCUS) / FAR / pixel
    predicted = math.sqrt(confusion**2 / 16.0 + far_pinhole[1] ** 2)
    assert confusion > 10.0 and far_pinhole[1] < 1.0
    assert far_lens[1] == pytest.approx(predicted, rel=BLUR_RTOL), (
        f"blur sd {far_lens[1]:.3f} px, thin lens predicts {predicted:.3f} px (CoC {confusion:.2f} px)")
    assert far_lens[0] == pytest.approx(far_pinhole[0], abs=0.5)          # blurred, not moved

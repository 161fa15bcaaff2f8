"""The integrator against closed-form radiometry: the furnace test and a configuration factor.

Both scenes are built by hand from arrays, with reference meshes from trimesh, and the expected pixel
positions come from the per-pixel pinhole camera of tests/naive_ray.py.
"""
import math

import numpy as np
import pytest
import trimesh
from naive_ray import pinhole_rays
from scipy import integrate

import tracer

# Radiance is summed in float64 from float32 per-sample values and stored as float32: a few units in the
# last place of float32 (2^-24 = 6e-8, IEEE 754 binary32) is all an exact result may be off by.
FLOAT_RTOL = 1e-6
# A Monte Carlo mean must lie within this many standard errors of the closed form (common practice:
# 3 sigma, a 0.3% false-alarm rate for a normal estimate), and its standard error below this fraction.
STANDARD_ERRORS = 3.0
MAX_RELATIVE_ERROR = 0.01
# scipy's adaptive quadrature of a smooth integrand is good to ~1e-10; 1e-8 when checking our formula.
QUADRATURE_RTOL = 1e-8

# ---- furnace test ----

ALBEDO = (0.8, 0.5, 0.2)
ENVIRONMENT = (1.0, 2.0, 0.5)
FURNACE_CAMERA = {"position": (0.0, 0.0, 4.0), "look_at": (0.0, 0.0, 0.0), "up": (0.0, 1.0, 0.0), "fov": 40.0}
FURNACE_SIZE = 32


def furnace_pixels(inner_radius: float):
    """Pixels whose whole square sees the ball of `inner_radius` (every sample hits the mesh), and pixels
    whose whole square misses the unit ball around the mesh (every sample sees the environment)."""
    camera = (FURNACE_CAMERA["position"], FURNACE_CAMERA["look_at"], FURNACE_CAMERA["up"],
              FURNACE_CAMERA["fov"], FURNACE_SIZE, FURNACE_SIZE)
    centre = np.zeros(3)                            # of the sphere

    def distance_from_centre(offset):
        origins, directions = pinhole_rays(*camera, offset=offset)
        return np.linalg.norm(np.cross(directions, centre - origins), axis=-1)

    # The rays that meet a ball form a cone, whose section by the image plane is an ellipse: convex, so
    # a pixel square whose four corner rays meet the inner ball lies wholly inside its image.
    inside = np.logical_and.reduce([distance_from_centre(corner) < inner_radius
                                    for corner in ((0, 0), (1, 0), (0, 1), (1, 1))])
    # Across a pixel a ray's distance from the centre changes by at most (distance to the centre) x
    # (angular radius of the pixel); keep a 50% margin on top.
    half_height = math.tan(math.radians(FURNACE_CAMERA["fov"]) / 2.0)
    pixel_radius = math.sqrt(2.0) * half_height / FURNACE_SIZE
    reach = np.linalg.norm(np.asarray(FURNACE_CAMERA["position"]) - centre)
    outside = distance_from_centre((0.5, 0.5)) > 1.0 + 1.5 * reach * pixel_radius
    return inside, outside


@pytest.mark.parametrize("bounces", (0, 1, 2, 6))
def test_furnace(make_scene, bounces):
    """Furnace test (common practice): a convex diffuse object of albedo rho in uniform environment E
    reflects rho*E, exactly: every bounce ray leaves the convex object and sees the environment once. With
    no bounce the object is black; the environment seen directly is E."""
    sphere = trimesh.creation.icosphere(subdivisions=3)         # convex, closed; vertices at radius 1
    inner_radius = float(np.min(np.einsum("ij,ij->i", sphere.face_normals, sphere.triangles[:, 0])))
    scene = make_scene([(sphere.vertices, sphere.faces, "diffuse", ALBEDO)], FURNACE_CAMERA,
                       environment=ENVIRONMENT, width=FURNACE_SIZE, height=FURNACE_SIZE, samples=8,
                       bounces=bounces)
    result = tracer.render(scene, accel="bvh")
    radiance = result.radiance.astype(np.float64)
    rho = np.asarray(ALBEDO, np.float32).astype(np.float64)
    environment = np.asarray(ENVIRONMENT)
    object_radiance = rho * environment if bounces >= 1 else np.zeros(3)
    inside, outside = furnace_pixels(inner_radius)
    assert np.count_nonzero(inside) > 150 and np.count_nonzero(outside) > 150
    np.testing.assert_allclose(radiance[inside], np.broadcast_to(object_radiance, radiance[inside].shape),
                               rtol=FLOAT_RTOL, atol=0.0)
    np.testing.assert_allclose(radiance[outside], np.broadcast_to(environment, radiance[outside].shape),
                               rtol=FLOAT_RTOL, atol=0.0)
    # Silhouette pixels mix the two by their fraction of samples on the object, which the albedo channel
    # (mean over samples of rho on a hit, 0 on a miss) records: the same relation holds there.
    hit_fraction = result.channels["albedo.R"].astype(np.float64) / rho[0]
    expected = (hit_fraction[..., None] * object_radiance + (1.0 - hit_fraction[..., None]) * environment)
    np.testing.assert_allclose(radiance, expected, rtol=FLOAT_RTOL, atol=FLOAT_RTOL * environment.max())


# ---- configuration factor: differential floor element to a parallel rectangular emitter ----

def corner_factor(a, b, h):
    """Configuration factor from a differential planar element to a parallel a x b rectangle at height
    h whose corner lies on the element's normal.

    Howell, "A Catalog of Radiation Heat Transfer Configuration Factors", case B-3 (also in Siegel &
    Howell, "Thermal Radiation Heat Transfer"; case number and formula from memory, so the formula is
    checked against its defining integral in `test_corner_factor_formula`):
        F = 1/(2 pi) [ A/sqrt(1+A^2) atan(B/sqrt(1+A^2)) + B/sqrt(1+B^2) atan(A/sqrt(1+B^2)) ],
    A = a/h, B = b/h. The expression is odd in A and in B, so signed extents describe rectangles on
    either side of the normal (used by `rectangle_factor`).
    """
    big_a, big_b = np.asarray(a) / h, np.asarray(b) / h
    root_a, root_b = np.sqrt(1.0 + big_a**2), np.sqrt(1.0 + big_b**2)
    return (big_a / root_a * np.arctan(big_b / root_a)
            + big_b / root_b * np.arctan(big_a / root_b)) / (2.0 * np.pi)


def rectangle_factor(x, z, rect, h):
    """Factor from floor points (x, 0, z) to the rectangle rect = (x0, x1, z0, z1) at height h, by
    superposition of the four corner rectangles (factor algebra; Howell's catalog, introduction)."""
    x0, x1, z0, z1 = rect
    return (corner_factor(x1 - x, z1 - z, h) - corner_factor(x0 - x, z1 - z, h)
            - corner_factor(x1 - x, z0 - z, h) + corner_factor(x0 - x, z0 - z, h))


def test_corner_factor_formula():
    """Our transcription of the catalog formula against its definition, F = integral over the rectangle
    of cos(theta1) cos(theta2) / (pi r^2) dA (Siegel & Howell, definition of the configuration factor),
    and against the limit 1/4 of a quarter of an infinite parallel plane."""
    for a, b, h in ((1.0, 0.6, 1.0), (0.3, 2.0, 0.7), (5.0, 5.0, 0.5)):
        exact, _ = integrate.dblquad(lambda z, x, h=h: h * h / (math.pi * (x * x + z * z + h * h) ** 2),
                                     0.0, a, 0.0, b, epsabs=0.0, epsrel=1e-11)
        assert corner_factor(a, b, h) == pytest.approx(exact, rel=QUADRATURE_RTOL)
    assert corner_factor(1e9, 1e9, 1.0) == pytest.approx(0.25, rel=1e-8)


EMITTER_RECT = (0.0, 1.0, 0.0, 0.6)       # x0, x1, z0, z1 of the emitter
EMITTER_HEIGHT = 1.0
EMITTER_RADIANCE = (4.0, 2.0, 1.0)
FLOOR_ALBEDO = (0.8, 0.5, 0.25)
PATCH_HALF_WIDTH = 0.1                     # half-width of the floor patch the camera sees
FACTOR_SIZE = 32


@pytest.mark.parametrize("point", ("centre", "corner"))
def test_floor_radiance_under_rectangular_emitter(make_scene, point):
    """Floor radiance under a one-sided Lambertian emitter of radiance Le (direct light only, bounces=1):
    L = rho/pi * E, and the irradiance E = pi Le F (Siegel & Howell), so L = rho Le F with F the factor of
    Howell's catalog case B-3 (below a corner) or the sum of four such rectangles (below the centre)."""
    x0, x1, z0, z1 = EMITTER_RECT
    h = EMITTER_HEIGHT
    floor = np.array([[-10.0, 0.0, -10.0], [-10.0, 0.0, 10.0], [10.0, 0.0, 10.0], [10.0, 0.0, -10.0]])
    emitter = np.array([[x0, h, z0], [x1, h, z0], [x1, h, z1], [x0, h, z1]])
    quad = np.array([[0, 1, 2], [0, 2, 3]])
    # Front sides by the right-hand rule (INTERFACE.md): the floor faces up, the emitter down.
    assert np.cross(floor[1] - floor[0], floor[2] - floor[0])[1] > 0.0
    assert np.cross(emitter[1] - emitter[0], emitter[2] - emitter[0])[1] < 0.0
    px, pz = (0.5 * (x0 + x1), 0.5 * (z0 + z1)) if point == "centre" else (x0, z0)
    # The camera, a point, hangs between floor and emitter looking straight down (it blocks no light).
    camera_height = 0.5 * h
    camera = {"position": (px, camera_height, pz), "look_at": (px, 0.0, pz), "up": (0.0, 0.0, 1.0),
              "fov": math.degrees(2.0 * math.atan(PATCH_HALF_WIDTH / camera_height))}
    scene = make_scene([(floor, quad, "diffuse", FLOOR_ALBEDO), (emitter, quad, "emitter", EMITTER_RADIANCE)],
                       camera, width=FACTOR_SIZE, height=FACTOR_SIZE, samples=64, bounces=1)
    result = tracer.render(scene, accel="bvh")
    # Where each pixel centre's ray meets the floor (per-pixel reference camera).
    origins, directions = pinhole_rays(camera["position"], camera["look_at"], camera["up"], camera["fov"],
                                       FACTOR_SIZE, FACTOR_SIZE)
    t = -origins[..., 1] / directions[..., 1]
    floor_x, floor_z = origins[..., 0] + t * directions[..., 0], origins[..., 2] + t * directions[..., 2]
    expected_factor = rectangle_factor(floor_x, floor_z, EMITTER_RECT, h)
    scale = (np.asarray(FLOOR_ALBEDO, np.float32).astype(np.float64)
             * np.asarray(EMITTER_RADIANCE, np.float32).astype(np.float64))
    for channel in range(3):
        measured_factor = result.radiance[..., channel].astype(np.float64) / scale[channel]
        residual = measured_factor - expected_factor
        standard_error = residual.std(ddof=1) / math.sqrt(residual.size)
        assert standard_error < MAX_RELATIVE_ERROR * expected_factor.mean()
        assert abs(residual.mean()) < STANDARD_ERRORS * standard_error, (
            f"channel {channel}: measured F {measured_factor.mean():.5f} vs Howell "
            f"{expected_factor.mean():.5f} (standard error {standard_error:.2e})")

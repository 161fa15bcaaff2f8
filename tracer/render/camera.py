"""Pinhole and thin-lens camera: image-plane geometry and primary-ray generation.

Thin lens: a point on the lens disk of diameter `aperture` is joined to the point where the pinhole
ray meets the plane in focus at `focus_distance` (Pharr, Jakob & Humphreys, "Physically Based
Rendering", 3rd ed., section 6.2.3). Rows count from the top of the image.
"""
import math

import numba
import numpy as np

from tracer.scene.types import Camera

# Layout of the camera parameter vector passed to the kernels.
C_POS, C_RIGHT, C_UP, C_FWD = 0, 3, 6, 9
C_TAN_HALF, C_ASPECT, C_LENS_RADIUS, C_FOCUS = 12, 13, 14, 15


def camera_params(camera: Camera, width: int, height: int) -> np.ndarray:
    """(16,) float64: position, right, up, forward (orthonormal), tan(fov/2), aspect, lens radius, focus."""
    position = np.asarray(camera.position, np.float64)
    forward = np.asarray(camera.look_at, np.float64) - position
    forward /= np.linalg.norm(forward)
    right = np.cross(forward, np.asarray(camera.up, np.float64))
    right /= np.linalg.norm(right)
    up = np.cross(right, forward)
    out = np.empty(16)
    out[C_POS:C_POS + 3], out[C_RIGHT:C_RIGHT + 3] = position, right
    out[C_UP:C_UP + 3], out[C_FWD:C_FWD + 3] = up, forward
    out[C_TAN_HALF] = math.tan(math.radians(camera.fov) / 2.0)
    out[C_ASPECT] = width / height
    out[C_LENS_RADIUS] = camera.aperture / 2.0
    out[C_FOCUS] = camera.focus_distance
    return out


@numba.njit(cache=True, error_model="numpy", inline="always")
def _concentric_disk(u1, u2):
    """Uniform point on the unit disk (Shirley & Chiu 1997, "A low distortion map between disk and
    square", Journal of Graphics Tools 2(3))."""
    a, b = 2.0 * u1 - 1.0, 2.0 * u2 - 1.0
    if a == 0.0 and b == 0.0:
        return 0.0, 0.0
    if abs(a) > abs(b):
        r, phi = a, (math.pi / 4.0) * (b / a)
    else:
        r, phi = b, math.pi / 2.0 - (math.pi / 4.0) * (a / b)
    return r * math.cos(phi), r * math.sin(phi)


@numba.njit(cache=True, error_model="numpy")
def camera_ray(cam, width, height, row, col, px, py, lens_u, lens_v):
    """Origin and unit direction of the ray through image point (col + px, row + py), px, py in [0, 1)."""
    sx = (2.0 * (col + px) / width - 1.0) * cam[C_TAN_HALF] * cam[C_ASPECT]
    sy = (1.0 - 2.0 * (row + py) / height) * cam[C_TAN_HALF]
    dx = cam[C_FWD] + sx * cam[C_RIGHT] + sy * cam[C_UP]
    dy = cam[C_FWD + 1] + sx * cam[C_RIGHT + 1] + sy * cam[C_UP + 1]
    dz = cam[C_FWD + 2] + sx * cam[C_RIGHT + 2] + sy * cam[C_UP + 2]
    ox, oy, oz = cam[C_POS], cam[C_POS + 1], cam[C_POS + 2]
    if cam[C_LENS_RADIUS] > 0.0:
        # The pinhole direction has unit forward component, so the focus point is at focus * d.
        fx, fy, fz = ox + cam[C_FOCUS] * dx, oy + cam[C_FOCUS] * dy, oz + cam[C_FOCUS] * dz
        lx, ly = _concentric_disk(lens_u, lens_v)
        lx *= cam[C_LENS_RADIUS]
        ly *= cam[C_LENS_RADIUS]
        ox += lx * cam[C_RIGHT] + ly * cam[C_UP]
        oy += lx * cam[C_RIGHT + 1] + ly * cam[C_UP + 1]
        oz += lx * cam[C_RIGHT + 2] + ly * cam[C_UP + 2]
        dx, dy, dz = fx - ox, fy - oy, fz - oz
    inv = 1.0 / math.sqrt(dx * dx + dy * dy + dz * dz)
    return ox, oy, oz, dx * inv, dy * inv, dz * inv

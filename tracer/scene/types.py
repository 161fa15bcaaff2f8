"""The parsed scene: flat numpy arrays ready for the kernels, plus the camera and render settings."""
from typing import NamedTuple

import numpy as np

# Material kinds; the row layout of `Scene.material_params` (float32, one row per material).
DIFFUSE, EMITTER, METAL, GLASS = 0, 1, 2, 3
MATERIAL_KINDS = {"diffuse": DIFFUSE, "emitter": EMITTER, "metal": METAL, "glass": GLASS}
# Columns of a material row.
M_KIND = 0          # one of the kinds above
M_COLOR = 1         # 1..3: diffuse albedo, or metal color (reflectance at normal incidence)
M_EMISSION = 4      # 4..6: emitted radiance (emitter radiance or diffuse emission); 0 if none
M_ROUGHNESS = 7     # metal roughness (GGX alpha = roughness^2)
M_IOR = 8           # glass index of refraction
M_TWO_SIDED = 9     # 1.0 if the surface emits on both sides
MATERIAL_COLUMNS = 12


class Camera(NamedTuple):
    position: np.ndarray        # (3,) float64
    look_at: np.ndarray         # (3,) float64
    up: np.ndarray              # (3,) float64
    fov: float                  # vertical field of view, degrees
    aperture: float             # thin-lens diameter; 0 = pinhole
    focus_distance: float       # distance to the plane in focus


class RenderSettings(NamedTuple):
    width: int = 640
    height: int = 400
    samples: int = 64
    bounces: int = 8
    seed: int = 1


class Scene(NamedTuple):
    path: str                       # the scene file
    name: str                       # its stem
    vertices: np.ndarray            # (V, 3) float64, world space
    faces: np.ndarray               # (F, 3) int32, counter-clockwise seen from the front
    material_of: np.ndarray         # (F,) int32 row of material_params
    material_names: tuple           # (M,) names in row order
    material_params: np.ndarray     # (M, MATERIAL_COLUMNS) float32
    emitters: np.ndarray            # (E,) int32 ids of triangles whose material emits
    camera: Camera
    environment: np.ndarray         # (3,) float64 uniform radiance from every direction
    settings: RenderSettings
    warnings: tuple = ()            # notices for the user (dropped triangles, fallbacks)

    @property
    def triangles(self) -> int:
        return int(self.faces.shape[0])

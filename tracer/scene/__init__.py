"""Scene files: TOML parsing and validation, built-in shapes, mesh files -> flat arrays (types.py)."""
from tracer.scene.toml import (
    MAX_BOUNCES,
    MAX_IMAGE_PIXELS,
    MAX_IMAGE_SIDE,
    MAX_SAMPLES,
    MAX_SEED,
    load_scene,
    scene_from_document,
)
from tracer.scene.types import (
    DIFFUSE,
    EMITTER,
    GLASS,
    M_COLOR,
    M_EMISSION,
    M_IOR,
    M_KIND,
    M_ROUGHNESS,
    M_TWO_SIDED,
    MATERIAL_COLUMNS,
    MATERIAL_KINDS,
    METAL,
    Camera,
    RenderSettings,
    Scene,
)

__all__ = [
    "DIFFUSE", "EMITTER", "GLASS", "METAL", "MATERIAL_KINDS", "MATERIAL_COLUMNS",
    "M_KIND", "M_COLOR", "M_EMISSION", "M_ROUGHNESS", "M_IOR", "M_TWO_SIDED",
    "Camera", "RenderSettings", "Scene",
    "MAX_IMAGE_SIDE", "MAX_IMAGE_PIXELS", "MAX_SAMPLES", "MAX_BOUNCES", "MAX_SEED",
    "load_scene", "scene_from_document",
]

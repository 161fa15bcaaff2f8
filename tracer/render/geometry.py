"""What the integrator needs of a scene besides the structure: normals, materials and the emitter table."""
from typing import NamedTuple

import numpy as np

from tracer.scene.types import M_EMISSION, M_TWO_SIDED, Scene

BT709 = np.array([0.2126, 0.7152, 0.0722])   # ITU-R BT.709 luminance weights


class KernelScene(NamedTuple):
    tri_normal: np.ndarray       # (F, 3) float64 unit normal of each triangle's front side
    material_of: np.ndarray      # (F,) int32
    material_params: np.ndarray  # (M, 12) float64
    emit_tris: np.ndarray        # (E,) int32 emissive triangle ids
    emit_cdf: np.ndarray         # (E,) float64 cumulative choice probability (last = 1)
    emit_vertices: np.ndarray    # (E, 9) float64 v0, v1, v2
    emit_pdf_area: np.ndarray    # (E,) float64 p(choose triangle) / its area
    tri_light_pdf: np.ndarray    # (F,) float64 the same per scene triangle (0 if never sampled), for MIS
    environment: np.ndarray      # (3,) float64


def triangle_normals(vertices: np.ndarray, faces: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Unit front normals (right-hand rule) and areas of the triangles."""
    v = vertices[faces]
    cross = np.cross(v[:, 1] - v[:, 0], v[:, 2] - v[:, 0])
    length = np.linalg.norm(cross, axis=1)
    normal = cross / np.where(length > 0.0, length, 1.0)[:, None]
    return normal, 0.5 * length


def kernel_scene(scene: Scene) -> KernelScene:
    vertices = np.asarray(scene.vertices, np.float64)
    faces = np.asarray(scene.faces, np.int64)
    normal, area = triangle_normals(vertices, faces)
    params = np.asarray(scene.material_params, np.float64)
    emit = np.asarray(scene.emitters, np.int64)
    emission = params[scene.material_of[emit], M_EMISSION:M_EMISSION + 3] if len(emit) else np.zeros((0, 3))
    sides = 1.0 + (params[scene.material_of[emit], M_TWO_SIDED] > 0.5) if len(emit) else np.zeros(0)
    # Choose by emitted power: area x luminance of the radiance x number of emitting sides.
    power = area[emit] * (emission @ BT709) * sides
    keep = power > 0.0
    emit, power = emit[keep], power[keep]
    total = power.sum()
    select = power / total if total > 0 else power
    cdf = np.cumsum(select)
    if len(cdf):
        cdf[-1] = 1.0
    tri_light_pdf = np.zeros(len(faces))
    tri_light_pdf[emit] = select / area[emit]
    return KernelScene(
        tri_normal=np.ascontiguousarray(normal),
        material_of=np.ascontiguousarray(scene.material_of, np.int32),
        material_params=np.ascontiguousarray(params),
        emit_tris=emit.astype(np.int32),
        emit_cdf=cdf.astype(np.float64),
        emit_vertices=np.ascontiguousarray(vertices[faces[emit]].reshape(-1, 9)),
        emit_pdf_area=(select / area[emit]).astype(np.float64),
        tri_light_pdf=tri_light_pdf,
        environment=np.asarray(scene.environment, np.float64).reshape(3),
    )

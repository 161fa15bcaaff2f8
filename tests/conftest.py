"""Shared fixtures: scenes assembled by hand from arrays (the `Scene` of tracer.scene.types)."""
import numpy as np
import pytest

from tracer.scene.types import (
    DIFFUSE,
    EMITTER,
    M_COLOR,
    M_EMISSION,
    M_KIND,
    MATERIAL_COLUMNS,
    Camera,
    RenderSettings,
    Scene,
)


def _scene(parts, camera, environment=(0.0, 0.0, 0.0), width=32, height=32, samples=16, bounces=1,
           seed=1) -> Scene:
    """parts: (vertices (V, 3), faces (F, 3), kind "diffuse" or "emitter", albedo or radiance (3,)) each;
    camera: dict of position, look_at, up, fov (degrees); a pinhole camera."""
    vertices, faces, material_of, rows = [], [], [], []
    offset = 0
    for index, (part_vertices, part_faces, kind, colour) in enumerate(parts):
        row = np.zeros(MATERIAL_COLUMNS, np.float32)
        if kind == "diffuse":
            row[M_KIND], row[M_COLOR:M_COLOR + 3] = DIFFUSE, colour
        else:
            row[M_KIND], row[M_EMISSION:M_EMISSION + 3] = EMITTER, colour
        rows.append(row)
        vertices.append(np.asarray(part_vertices, np.float64))
        faces.append(np.asarray(part_faces, np.int64) + offset)
        material_of.append(np.full(len(part_faces), index, np.int32))
        offset += len(part_vertices)
    material_of = np.concatenate(material_of)
    params = np.array(rows, np.float32)
    emitters = np.flatnonzero(params[material_of, M_KIND] == EMITTER).astype(np.int32)
    position = np.asarray(camera["position"], np.float64)
    look_at = np.asarray(camera["look_at"], np.float64)
    return Scene(
        path="<by hand>", name="by-hand", vertices=np.concatenate(vertices),
        faces=np.concatenate(faces).astype(np.int32), material_of=material_of,
        material_names=tuple(f"m{i}" for i in range(len(rows))), material_params=params, emitters=emitters,
        camera=Camera(position, look_at, np.asarray(camera["up"], np.float64), float(camera["fov"]), 0.0,
                      float(np.linalg.norm(look_at - position))),
        environment=np.asarray(environment, np.float64),
        settings=RenderSettings(width=width, height=height, samples=samples, bounces=bounces, seed=seed))


@pytest.fixture(scope="session")
def make_scene():
    """A function building a `Scene` from parts (see `_scene`)."""
    return _scene

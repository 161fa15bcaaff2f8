"""Triangle meshes from files (OBJ, PLY, STL, glTF/GLB, OFF), read through trimesh.

A file holding several geometries (a glTF scene graph, an OBJ split by groups or materials) is
flattened into one triangle list with trimesh's node transforms applied (``Scene.to_mesh``).
Polygons are triangulated by trimesh. Vertices are kept as written (``process=False``: no merging, no
silent repair), so that bad data can be reported: a non-finite vertex or a face index outside the
vertex list is an error naming the file. Zero-area triangles are dropped later, with a warning, by the
scene loader (``shapes.drop_degenerate``), together with those of the built-in shapes.
trimesh is imported on first use: most scenes hold no mesh file, and it takes a second to import.
"""
from pathlib import Path

import numpy as np

from tracer.errors import input_error

# Suffix -> trimesh file type. OFF is an extension beyond the formats INTERFACE.md names.
MESH_FORMATS = {".obj": "obj", ".ply": "ply", ".stl": "stl", ".gltf": "gltf", ".glb": "glb", ".off": "off"}


def read_mesh(file: Path, scene_path, table: str, shown_file: str):
    """Read `file`; return (V, 3) float64 vertices and (F, 3) int64 faces, counter-clockwise as stored.

    Errors are `UserError`s naming `scene_path`, `[table] file` and the mesh file (`shown_file`).
    """
    def fail(problem: str):
        return input_error(scene_path, table, "file", f"{shown_file}: {problem}")

    file_type = MESH_FORMATS.get(file.suffix.lower())
    if file_type is None:
        known = ", ".join(sorted(MESH_FORMATS))
        raise fail(f"unsupported mesh format {file.suffix or '(no suffix)'!r}; expected one of {known}")
    try:
        if not file.is_file():
            raise fail("no such file" if not file.exists() else "not a regular file")
        with open(file, "rb"):
            pass
    except (OSError, ValueError) as error:  # ValueError: a NUL character in the path
        raise fail(f"cannot open ({getattr(error, 'strerror', None) or error})") from None
    import trimesh
    try:
        loaded = trimesh.load(str(file), file_type=file_type, force="mesh", process=False)
        vertices = np.asarray(loaded.vertices, dtype=np.float64)
        faces = np.asarray(loaded.faces)
    except IndexError as error:
        # trimesh's OBJ reader indexes its vertex list with the face indices as written.
        raise fail(f"a face refers to a vertex that does not exist ({error})") from None
    except Exception as error:  # trimesh's readers raise many exception types on malformed files
        raise fail(f"cannot read as {file_type.upper()} ({type(error).__name__}: {error})") from None
    return _checked(vertices, faces, fail)


def _checked(vertices: np.ndarray, faces: np.ndarray, fail):
    """Refuse non-finite vertices, non-triangle faces and out-of-range face indices."""
    if faces.size == 0:
        raise fail("contains no triangles")
    if vertices.ndim != 2 or vertices.shape[1] != 3 or faces.ndim != 2 or faces.shape[1] != 3:
        raise fail(f"unexpected array shapes: vertices {vertices.shape}, faces {faces.shape}")
    if not np.issubdtype(faces.dtype, np.integer):
        raise fail(f"face indices are not integers ({faces.dtype})")
    not_finite = ~np.isfinite(vertices).all(axis=1)
    if not_finite.any():
        raise fail(f"{int(not_finite.sum())} of {vertices.shape[0]} vertices are NaN or infinite")
    outside = (faces < 0) | (faces >= vertices.shape[0])
    if outside.any():
        raise fail(f"a face refers to vertex {int(faces[outside][0])}, "
                   f"but there are only {vertices.shape[0]} vertices (counted from 0)")
    return vertices, faces.astype(np.int64)

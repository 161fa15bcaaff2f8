"""No structure: one leaf holding every triangle, so every ray tests every triangle (the O(N) baseline)."""
import numpy as np

from tracer.accel.tree import BRUTE, Tree, leaf_triangles, node_records, scene_bounds


def build_brute(vertices: np.ndarray, faces: np.ndarray, build: str = "none", leaf_size: int = 4) -> Tree:
    refs = np.arange(len(faces), dtype=np.int32)
    nodes_f, nodes_i = node_records(1)
    nodes_i[0, 6], nodes_i[0, 7] = 0, len(faces)
    bounds = scene_bounds(np.asarray(vertices, dtype=np.float64))
    nodes_f[0, :6] = bounds
    return Tree(BRUTE, nodes_f, nodes_i, refs, leaf_triangles(np.asarray(vertices), faces, refs), bounds)

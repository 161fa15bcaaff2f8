"""kd-tree (placeholder until the kd-tree lands)."""
import numpy as np

from tracer.errors import UserError


def build_kdtree(vertices: np.ndarray, faces: np.ndarray, build: str = "sah", leaf_size: int = 4):
    raise UserError("the kd-tree is not available yet")


def kdtree_stats(tree, n_triangles: int) -> dict:
    raise NotImplementedError

"""Acceleration structures: build one by name, trace rays through it, read its statistics.

`BUILDERS` maps "KIND:BUILD" to a function (vertices, faces, build, leaf_size) -> Tree; adding a
structure is one module and one entry here (see DEVELOPERS.md).
"""
import time
from typing import NamedTuple

import numpy as np

from tracer.accel import _traverse
from tracer.accel.brute import build_brute
from tracer.accel.bvh import build_bvh
from tracer.accel.kdtree import build_kdtree
from tracer.accel.lbvh import build_lbvh
from tracer.accel.stats import structure_stats
from tracer.accel.tree import BRUTE, BVH, KDTREE, Tree
from tracer.errors import UserError

BUILDERS = {
    "bvh:sah": build_bvh,
    "bvh:median": build_bvh,
    "bvh:lbvh": build_lbvh,
    "kdtree:sah": build_kdtree,
    "kdtree:median": build_kdtree,
    "brute:none": build_brute,
}
DEFAULT_BUILD = {"bvh": "sah", "kdtree": "sah", "brute": "none"}


def parse_spec(spec: str) -> tuple[str, str]:
    """"bvh" -> ("bvh", "sah"); "kdtree:median" -> ("kdtree", "median"); unknown names are a UserError."""
    kind, _, build = str(spec).partition(":")
    build = build or DEFAULT_BUILD.get(kind, "")
    if f"{kind}:{build}" not in BUILDERS:
        known = ", ".join(sorted({k.split(":")[0] if k.endswith(":" + DEFAULT_BUILD[k.split(':')[0]])
                                  else k for k in BUILDERS}))
        raise UserError(f"--accel {spec}: unknown structure (choose from {known})")
    return kind, build


def spec_name(kind: str, build: str) -> str:
    """The short SPEC of a structure: the kind alone for its default build."""
    return kind if DEFAULT_BUILD.get(kind) == build else f"{kind}:{build}"


class Hits(NamedTuple):
    t: np.ndarray           # (N,) float32 hit distance, inf on a miss
    triangle: np.ndarray    # (N,) int32 scene triangle id, -1 on a miss
    u: np.ndarray           # (N,) float32 barycentric weight of the triangle's second vertex
    v: np.ndarray           # (N,) float32 barycentric weight of its third vertex
    nodes: np.ndarray       # (N,) int32 nodes visited
    tris: np.ndarray        # (N,) int32 triangles tested


class Accel:
    """A built structure over a triangle mesh (see `build_accel`)."""

    def __init__(self, tree: Tree, kind: str, build: str, leaf_size: int, n_triangles: int,
                 build_seconds: float):
        self.tree = tree
        self.kind = kind
        self.build = build
        self.leaf_size = leaf_size
        self.triangles = n_triangles
        self.build_seconds = build_seconds
        self._stats = None

    @property
    def spec(self) -> str:
        return spec_name(self.kind, self.build)

    def _trace(self, origins, directions, t_max, closest: bool) -> Hits:
        origins = np.ascontiguousarray(origins, dtype=np.float32)
        directions = np.ascontiguousarray(directions, dtype=np.float32)
        if origins.ndim != 2 or origins.shape[1] != 3 or directions.shape != origins.shape:
            raise ValueError(f"origins and directions must both be (N, 3), got {origins.shape} "
                             f"and {directions.shape}")
        n = len(origins)
        t_max = np.ascontiguousarray(np.broadcast_to(np.asarray(t_max, np.float32), (n,)))
        t = np.empty(n, np.float32)
        triangle = np.empty(n, np.int32)
        u = np.zeros(n, np.float32)
        v = np.zeros(n, np.float32)
        nodes = np.empty(n, np.int32)
        tris = np.empty(n, np.int32)
        _traverse.intersect_rays(self.tree, origins, directions, t_max, closest, True, t, triangle, u, v,
                                 nodes, tris)
        return Hits(t, triangle, u, v, nodes, tris)

    def intersect(self, origins: np.ndarray, directions: np.ndarray, t_max=np.inf) -> Hits:
        """Closest hit with 0 < t < t_max of each ray o + t d; (N, 3) arrays in, `Hits` out.

        Directions need not be unit length; t is measured in units of the direction's length.
        """
        return self._trace(origins, directions, t_max, closest=True)

    def occluded(self, origins: np.ndarray, directions: np.ndarray, t_max=np.inf) -> Hits:
        """Any-hit (shadow-ray) query: Hits.t is 0 where something lies at 0 < t < t_max, inf elsewhere."""
        return self._trace(origins, directions, t_max, closest=False)

    def stats(self) -> dict:
        """The "build" statistics (see INTERFACE.md), computed once."""
        if self._stats is None:
            self._stats = {"seconds": self.build_seconds, "kind": self.kind, "build_method": self.build,
                           "leaf_size": self.leaf_size, "triangles": self.triangles,
                           **structure_stats(self.tree, self.triangles)}
        return dict(self._stats)


def build_accel(vertices: np.ndarray, faces: np.ndarray, kind: str = "bvh", build: str | None = None,
                leaf_size: int = 4) -> Accel:
    """Build a structure of `kind` ("bvh", "kdtree", "brute") with `build` (default: the kind's own).

    vertices: (V, 3) float; faces: (F, 3) int indices into vertices.
    """
    if ":" in kind:
        kind, build = parse_spec(kind)
    build = build or DEFAULT_BUILD.get(kind, "")
    if f"{kind}:{build}" not in BUILDERS:
        raise ValueError(f"unknown structure {kind}:{build}; known: {', '.join(sorted(BUILDERS))}")
    vertices = np.asarray(vertices, dtype=np.float64)
    faces = np.asarray(faces, dtype=np.int64)
    if vertices.ndim != 2 or vertices.shape[1] != 3 or faces.ndim != 2 or faces.shape[1] != 3:
        raise ValueError(f"vertices must be (V, 3) and faces (F, 3), got {vertices.shape}, {faces.shape}")
    if len(faces) and (faces.min() < 0 or faces.max() >= len(vertices)):
        raise ValueError("faces index outside vertices")
    if int(leaf_size) < 1:
        raise ValueError(f"leaf_size must be >= 1, got {leaf_size}")
    start = time.perf_counter()
    builder = BUILDERS[f"{kind}:{build}"] if len(faces) else build_brute
    tree = builder(vertices, faces, build, int(leaf_size))
    seconds = time.perf_counter() - start
    return Accel(tree, kind, build, int(leaf_size), len(faces), seconds)


__all__ = ["BUILDERS", "BRUTE", "BVH", "KDTREE", "Accel", "Hits", "Tree", "build_accel", "parse_spec",
           "spec_name"]

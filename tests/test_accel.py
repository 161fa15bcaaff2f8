"""Ray queries and BVH structure, checked against references outside the structures under test.

- Closest hits against trimesh's pure-numpy ray/mesh intersector (a general-purpose library).
- `bvh`, `bvh:median` and `brute` (no structure: every triangle tested) against each other, on random
  rays and on the cases that break slab tests: axis-parallel directions (components exactly +0 or -0),
  origins on node box faces, rays lying in a box face plane, t_max limits, any-hit queries.
- BVH invariants on random triangle soups (hypothesis): boxes bound their contents, every triangle is
  referenced once, leaf sizes, the "build" statistics of INTERFACE.md.
- Watertightness (Woop, Benthin & Wald 2013, "Watertight Ray/Triangle Intersection", JCGT 2(1), 65-82):
  a million rays from inside a closed icosphere never escape, also when aimed exactly at its vertices.

Every mesh is rounded to float32 before anyone sees it, and rays are float32-representable, so the
structures (float32 kernels) and the float64 references trace the same geometry.
"""
import numpy as np
import pytest
import trimesh
from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp
from naive_ray import closest_hits, plane_hit
from trimesh.ray.ray_triangle import RayMeshIntersector

import tracer

SPECS = ("bvh", "bvh:median", "brute")
# Hit distances: float32 arithmetic (IEEE 754 binary32, 24-bit significand) on coordinates of size ~ the
# scene gives ~1e-7 relative rounding per operation; 1e-5 of the ray's length scale leaves a margin
# of 100 (common practice).
DISTANCE_RTOL = 1e-5
# A hit whose barycentric distance from the triangle's nearest edge is below this grazes that edge:
# float32 rounding moves barycentrics by ~1e-6 on these meshes, so references may disagree there.
EDGE_BARYCENTRIC = 1e-4
# A ray within asin(0.1) ~ 6 degrees of a triangle's plane meets it ill-conditioned: float32 rounding of
# the plane moves the hit along the ray by (rounding / cosine), so barycentrics are compared only above.
GRAZING_COSINE = 0.1
# At most this fraction of random rays may disagree with the reference, all of them edge grazes.
GRAZING_FRACTION = 2e-3
# Sums of the same float64 terms in another order (SAH cost): 1e-9 is far above their rounding.
SUM_RTOL = 1e-9
RAYS = 2000
AXES_AND_DIAGONALS = np.array([(x, y, z) for x in (-1, 0, 1) for y in (-1, 0, 1) for z in (-1, 0, 1)
                               if (x, y, z) != (0, 0, 0)], dtype=np.float64)


def float32_exact(array) -> np.ndarray:
    return np.asarray(array, np.float64).astype(np.float32).astype(np.float64)


def soup(rng, count: int):
    """Random triangles of random sizes around random centres in [-1, 1]^3 (they may cross)."""
    centres = rng.uniform(-1.0, 1.0, (count, 1, 3))
    corners = centres + rng.normal(0.0, 0.3, (count, 3, 3))
    return corners.reshape(-1, 3), np.arange(3 * count).reshape(-1, 3)


def reference_meshes() -> dict:
    ico = trimesh.creation.icosphere(subdivisions=3)
    box = trimesh.creation.box(extents=(2.0, 1.0, 1.5)).subdivide().subdivide()  # edges in face planes
    meshes = {"icosphere": (ico.vertices, ico.faces), "soup": soup(np.random.default_rng(7), 300),
              "box": (box.vertices, box.faces)}
    return {name: (float32_exact(v), np.asarray(f, np.int64)) for name, (v, f) in meshes.items()}


MESHES = reference_meshes()


def scene_scale(vertices):
    lo, hi = vertices.min(axis=0), vertices.max(axis=0)
    return 0.5 * (lo + hi), float(np.linalg.norm(hi - lo))


def unit(vectors):
    return vectors / np.linalg.norm(vectors, axis=1, keepdims=True)


def random_rays(rng, vertices, count):
    """Half from a sphere far outside, half from inside the bounds, aimed at the enlarged bounds."""
    lo, hi = vertices.min(axis=0), vertices.max(axis=0)
    centre, size = scene_scale(vertices)
    size = max(size, 1e-3)                                      # a soup may collapse to a point
    outside = centre + 2.0 * size * unit(rng.normal(size=(count // 2, 3)))
    inside = rng.uniform(lo, hi, (count - count // 2, 3))
    origins = np.concatenate([outside, inside])
    margin = 0.1 * (hi - lo) + 0.1 * size
    targets = rng.uniform(lo - margin, hi + margin, (count, 3))
    return float32_exact(origins), float32_exact(unit(targets - origins))


def signed_zeros(rng, directions):
    """Make each zero component +0.0 or -0.0 at random (the sign of zero flips 1/d to -inf)."""
    directions = directions.copy()
    zero = directions == 0.0
    directions[zero] = np.where(rng.random(np.count_nonzero(zero)) < 0.5, 0.0, -0.0)
    return directions


def axis_parallel_rays(rng, vertices, faces, count):
    """Directions along axes and face/space diagonals; half the origins anywhere around the mesh, half
    placed a random distance before a random point of a random triangle (so they mostly hit)."""
    lo, hi = vertices.min(axis=0), vertices.max(axis=0)
    directions = unit(AXES_AND_DIAGONALS[rng.integers(0, len(AXES_AND_DIAGONALS), count)])
    origins = rng.uniform(lo - 0.5 * (hi - lo), hi + 0.5 * (hi - lo), (count, 3))
    aimed = np.arange(count) < count // 2
    corners = vertices[faces[rng.integers(0, len(faces), count)]]
    # An aimed ray parallel to its triangle would run in that triangle's plane (a box face plane, for
    # an axis-aligned triangle: the in-plane set below); take a direction that crosses the plane instead.
    normal = np.cross(corners[:, 1] - corners[:, 0], corners[:, 2] - corners[:, 0])
    crossing = np.abs(normal @ unit(AXES_AND_DIAGONALS).T)            # (count, 26)
    best = np.argmax(crossing + rng.random(crossing.shape) * (crossing > 0), axis=1)
    flat = (np.abs(np.einsum("ij,ij->i", normal, directions)) == 0.0) & normal.any(axis=1)
    directions[flat] = unit(AXES_AND_DIAGONALS[best[flat]])
    weights = rng.dirichlet(np.ones(3), count)
    targets = np.einsum("ij,ijk->ik", weights, corners)
    distance = rng.uniform(0.0, max(scene_scale(vertices)[1], 1e-3), count)
    origins[aimed] = (targets - distance[:, None] * directions)[aimed]
    return float32_exact(origins), signed_zeros(rng, float32_exact(directions))


def node_boxes(vertices, faces):
    """(N, 6) float64 boxes of every node of the SAH and the median BVH over the mesh."""
    trees = [tracer.build_accel(vertices, faces, kind="bvh", build=b).tree for b in ("sah", "median")]
    return np.array([np.concatenate([node.lo, node.hi]) for tree in trees for node in decode_bvh(tree)])


def box_face_rays(rng, vertices, faces, count, in_plane: bool):
    """Origins exactly on a face of a node box (the slab plane: 0 * 1/d cases).

    in_plane False: generic directions and space diagonals (no zero component), leaving the plane.
    in_plane True: axis-parallel directions inside the face plane (zero component along its normal), so
    the ray runs along the slab boundary; half the origins are moved outside the root box along the plane.
    """
    boxes = node_boxes(vertices, faces)
    box = boxes[rng.integers(0, len(boxes), count)]
    lo, hi = box[:, :3], box[:, 3:]
    axis = rng.integers(0, 3, count)
    rows = np.arange(count)
    origins = rng.uniform(lo, hi)
    origins[rows, axis] = np.where(rng.random(count) < 0.5, lo[rows, axis], hi[rows, axis])
    directions = AXES_AND_DIAGONALS[rng.integers(0, len(AXES_AND_DIAGONALS), count)].copy()
    if in_plane:
        directions[rows, axis] = 0.0
        directions[~directions.any(axis=1)] = np.roll(np.eye(3), 1, axis=1)[axis[~directions.any(axis=1)]]
        outside = rng.random(count) < 0.5
        root_lo, root_hi = vertices.min(axis=0), vertices.max(axis=0)
        # Step back along the ray from outside the root box: the ray still lies in the face plane.
        back = 2.0 * np.linalg.norm(root_hi - root_lo)
        origins[outside] -= back * unit(directions[outside])
    else:
        # No zero component: an origin on one box face may lie in other boxes' planes as well.
        generic = rng.random(count) < 0.5
        directions[generic] = unit(rng.normal(size=(np.count_nonzero(generic), 3)))
        directions[directions == 0.0] = 1.0
    return float32_exact(origins), signed_zeros(rng, float32_exact(unit(directions)))


def hits_agree(t, ref_t, scale):
    """Both miss, or both hit within DISTANCE_RTOL * scale of each other."""
    hit, ref_hit = np.isfinite(t), np.isfinite(ref_t)
    gap = np.abs(np.where(hit & ref_hit, t, 0.0) - np.where(hit & ref_hit, ref_t, 0.0))
    return np.where(hit & ref_hit, gap <= DISTANCE_RTOL * scale, hit == ref_hit)


def grazes_edge(origins, directions, vertices, faces, triangle):
    """Whether each ray meets the plane of `triangle` (one id per ray, -1 = none) near its edges."""
    has = triangle >= 0
    out = np.zeros(len(triangle), bool)
    _, w, u, v = plane_hit(origins[has], directions[has], vertices[faces[triangle[has]]])
    out[has] = np.abs(np.minimum(np.minimum(w, u), v)) <= EDGE_BARYCENTRIC
    return out


def assert_same_closest_hits(hits, reference, origins, directions, vertices, faces) -> int:
    """Structures must agree with brute force: the same hits, and the same triangle unless two triangles
    tie at a shared edge. The same triangle goes through the same arithmetic, so t, u, v are then
    bit-identical (INTERFACE.md: structures differ only where they return different hits). Returns the
    number of ties."""
    centre, size = scene_scale(vertices)
    scale = size + np.linalg.norm(origins - centre, axis=1)
    hit, ref_hit = np.isfinite(hits.t), np.isfinite(reference.t)
    bad = np.flatnonzero(hit != ref_hit)
    assert len(bad) == 0, (f"{len(bad)} hit/miss disagreements, e.g. origin {origins[bad[0]].tolist()} "
                           f"direction {directions[bad[0]].tolist()}: "
                           f"t {hits.t[bad[0]]} vs {reference.t[bad[0]]} (brute force)")
    same = hits.triangle == reference.triangle
    assert np.array_equal(hits.t[same], reference.t[same])
    assert np.array_equal(hits.u[same], reference.u[same])
    assert np.array_equal(hits.v[same], reference.v[same])
    tie = ~same
    assert np.all(np.abs(hits.t[tie] - reference.t[tie]) <= DISTANCE_RTOL * scale[tie])
    both_graze = (grazes_edge(origins, directions, vertices, faces, np.where(tie, hits.triangle, -1))
                  & grazes_edge(origins, directions, vertices, faces, np.where(tie, reference.triangle, -1)))
    assert np.array_equal(both_graze, tie), "different triangles away from any shared edge"
    return int(np.count_nonzero(tie))


@pytest.fixture(scope="module")
def trimesh_reference():
    """Closest hits of trimesh's RayMeshIntersector (general-purpose library) on RAYS random rays per mesh."""
    rng = np.random.default_rng(11)
    out = {}
    for name, (vertices, faces) in MESHES.items():
        origins, directions = random_rays(rng, vertices, RAYS)
        mesh = trimesh.Trimesh(vertices, faces, process=False)
        tri, ray, location = RayMeshIntersector(mesh).intersects_id(
            origins, directions, multiple_hits=False, return_locations=True)
        t = np.full(RAYS, np.inf)
        t[ray] = np.einsum("ij,ij->i", location - origins[ray], directions[ray])   # unit directions
        triangle = np.full(RAYS, -1)
        triangle[ray] = tri
        out[name] = origins, directions, t, triangle
    return out


@pytest.mark.parametrize("spec", SPECS)
@pytest.mark.parametrize("mesh", sorted(MESHES))
def test_closest_hits_match_trimesh(trimesh_reference, mesh, spec):
    vertices, faces = MESHES[mesh]
    origins, directions, ref_t, ref_triangle = trimesh_reference[mesh]
    hits = tracer.build_accel(vertices, faces, kind=spec).intersect(origins, directions)
    centre, size = scene_scale(vertices)
    scale = size + np.linalg.norm(origins - centre, axis=1)
    assert 0.2 * RAYS < np.count_nonzero(ref_triangle >= 0) < RAYS     # the ray set has hits and misses
    # Reference: trimesh.ray.ray_triangle (general-purpose library), closest hit along unit rays.
    agree = hits_agree(hits.t, ref_t, scale)
    # trimesh accepts barycentrics down to -1e-12 and we test edges exactly in float32, so the two may
    # differ on a ray that grazes the shared edge of two triangles (or a silhouette edge): allow a
    # tiny fraction of disagreements, each one a graze of an edge of a triangle either side reports.
    graze = (grazes_edge(origins, directions, vertices, faces, hits.triangle)
             | grazes_edge(origins, directions, vertices, faces, ref_triangle))
    assert np.count_nonzero(~agree) <= GRAZING_FRACTION * RAYS
    assert np.all(graze[~agree]), "a disagreement with trimesh away from any edge"
    # Same triangle wherever neither side's hit is near an edge (a tie between neighbours otherwise).
    assert np.all((hits.triangle == ref_triangle)[agree & ~graze])


def ray_set(name, rng, vertices, faces):
    if name == "random":
        return random_rays(rng, vertices, RAYS)
    if name == "axis_parallel":
        return axis_parallel_rays(rng, vertices, faces, RAYS)
    return box_face_rays(rng, vertices, faces, RAYS, in_plane=name == "in_box_face_plane")


@pytest.mark.parametrize("spec", ("bvh", "bvh:median"))
@pytest.mark.parametrize("rays", ("random", "axis_parallel", "from_box_faces", "in_box_face_plane"))
@pytest.mark.parametrize("mesh", sorted(MESHES))
def test_structures_match_brute_force(mesh, rays, spec):
    vertices, faces = MESHES[mesh]
    origins, directions = ray_set(rays, np.random.default_rng(23), vertices, faces)
    reference = tracer.build_accel(vertices, faces, kind="brute").intersect(origins, directions)
    hits = tracer.build_accel(vertices, faces, kind=spec).intersect(origins, directions)
    # Reference: brute force, the definition of the closest hit (smallest t over every triangle).
    assert np.count_nonzero(np.isfinite(reference.t)) > 0.1 * RAYS
    # Origins on box faces lie on the grid lines of the subdivided box, so many rays there pass exactly
    # through shared edges: each tie is checked, not their number.
    ties = assert_same_closest_hits(hits, reference, origins, directions, vertices, faces)
    if rays == "random":
        assert ties <= GRAZING_FRACTION * RAYS


@pytest.mark.parametrize("spec", ("bvh", "bvh:median"))
def test_rays_in_a_box_face_plane_keep_their_hits(spec):
    """The smallest cases of the in-plane family above. A ray lying in the plane of a box face has a zero
    direction component along that axis; the slab test (Kay & Kajiya 1986) must then take the whole
    line for that axis when the origin lies within the closed slab, so that a structure returns what
    brute force returns. The hits here are on triangle edges and vertices, which the watertight test
    (Woop et al. 2013) counts as hits."""
    box = trimesh.creation.box(extents=(2.0, 2.0, 2.0))          # faces at +-1
    corner = (np.array([[0.0, 0.0, 0.0], [1.0, 0.0, 0.0], [0.0, 1.0, 0.0]]), np.array([[0, 1, 2]]))
    cases = [
        # In the plane x = +1 of the box's +X face, with +0 along x: meets the bottom face's edge at t = 2.
        (box.vertices, box.faces, (1.0, -3.0, 0.3), (0.0, 1.0, 0.0)),
        # In the plane x = -1, with -0 along x.
        (box.vertices, box.faces, (-1.0, -3.0, 0.3), (-0.0, 1.0, 0.0)),
        # Along the z axis through the triangle's vertex at the origin, with -0 along x and y.
        (*corner, (0.0, 0.0, -0.5), (-0.0, -0.0, 1.0)),
    ]
    for vertices, faces, origin, direction in cases:
        origins, directions = np.array([origin]), np.array([direction])
        reference = tracer.build_accel(vertices, faces, kind="brute").intersect(origins, directions)
        assert np.isfinite(reference.t[0])
        hits = tracer.build_accel(vertices, faces, kind=spec).intersect(origins, directions)
        assert hits.t[0] == reference.t[0], (f"origin {origin} direction {direction}: t {hits.t[0]}, "
                                             f"brute force {reference.t[0]}")


@pytest.mark.parametrize("rays", ("random", "axis_parallel"))
@pytest.mark.parametrize("mesh", sorted(MESHES))
def test_brute_force_matches_moller_trumbore(mesh, rays):
    """The float32 watertight test against float64 Möller & Trumbore (1997), tests/naive_ray.py."""
    vertices, faces = MESHES[mesh]
    origins, directions = ray_set(rays, np.random.default_rng(29), vertices, faces)
    hits = tracer.build_accel(vertices, faces, kind="brute").intersect(origins, directions)
    naive = closest_hits(origins, directions, vertices, faces)
    centre, size = scene_scale(vertices)
    scale = size + np.linalg.norm(origins - centre, axis=1)
    agree = hits_agree(hits.t, naive.t, scale)
    graze = (grazes_edge(origins, directions, vertices, faces, hits.triangle)
             | grazes_edge(origins, directions, vertices, faces, naive.triangle))
    assert np.count_nonzero(~agree) <= GRAZING_FRACTION * RAYS
    assert np.all(graze[~agree])
    same = agree & ~graze & np.isfinite(hits.t)
    assert np.all(hits.triangle[same] == naive.triangle[same])
    # Barycentrics: the hit point is (1-u-v) v0 + u v1 + v v2 (INTERFACE.md), as in Möller & Trumbore;
    # it lies on the ray at distance t.
    corners = vertices[faces[hits.triangle[same]]]
    u, v = hits.u[same, None].astype(np.float64), hits.v[same, None].astype(np.float64)
    point = (1.0 - u - v) * corners[:, 0] + u * corners[:, 1] + v * corners[:, 2]
    on_ray = origins[same] + hits.t[same, None] * directions[same]
    assert np.all(np.linalg.norm(point - on_ray, axis=1) <= DISTANCE_RTOL * scale[same])
    # The same barycentrics as the float64 reference, where the ray is not near the triangle's plane.
    normal = unit(np.cross(corners[:, 1] - corners[:, 0], corners[:, 2] - corners[:, 0]))
    steep = np.abs(np.einsum("ij,ij->i", normal, unit(directions[same]))) >= GRAZING_COSINE
    assert np.allclose(hits.u[same][steep], naive.u[same][steep], atol=EDGE_BARYCENTRIC)
    assert np.allclose(hits.v[same][steep], naive.v[same][steep], atol=EDGE_BARYCENTRIC)


def t_max_cases(rng, closest_t):
    """A t_max per ray: below, just below, just above and well above the closest hit; finite on misses."""
    factor = np.array([0.0, 0.5, 0.999, 1.001, 2.0])[rng.integers(0, 5, len(closest_t))]
    hit = np.isfinite(closest_t)
    return np.where(hit, np.where(hit, closest_t, 0.0) * factor, rng.uniform(0.0, 10.0, len(closest_t)))


@pytest.mark.parametrize("spec", SPECS)
@pytest.mark.parametrize("mesh", sorted(MESHES))
def test_t_max_limits_and_any_hit(mesh, spec):
    """Closest hit below t_max is the unlimited closest hit if that lies below t_max, else nothing; any-hit
    (occluded) reports a blocker exactly when the closest hit lies below t_max (definition of the queries,
    INTERFACE.md; common practice for shadow rays)."""
    vertices, faces = MESHES[mesh]
    rng = np.random.default_rng(31)
    origins, directions = random_rays(rng, vertices, RAYS)
    accel = tracer.build_accel(vertices, faces, kind=spec)
    unlimited = accel.intersect(origins, directions)
    t_max = t_max_cases(rng, unlimited.t).astype(np.float32)
    limited = accel.intersect(origins, directions, t_max=t_max)
    below = unlimited.t < t_max
    # Rays whose closest hit lies within rounding of t_max may go either way.
    decided = np.abs(unlimited.t.astype(np.float64) - t_max) > DISTANCE_RTOL * np.maximum(t_max, 1.0)
    decided |= ~np.isfinite(unlimited.t)
    assert np.count_nonzero(decided & below) > 0.1 * RAYS and np.count_nonzero(decided & ~below) > 0.1 * RAYS
    assert np.array_equal(np.isfinite(limited.t)[decided], below[decided])
    keep = decided & below
    assert np.array_equal(limited.t[keep], unlimited.t[keep])
    assert np.array_equal(limited.triangle[keep], unlimited.triangle[keep])
    assert np.all(limited.triangle[decided & ~below] == -1)
    for limit, closest_below in ((t_max, below), (np.inf, np.isfinite(unlimited.t))):
        blocked = accel.occluded(origins, directions, t_max=limit).t == 0.0
        assert np.array_equal(blocked[decided], closest_below[decided])


def test_brute_counts_every_triangle():
    """brute force: no nodes, every triangle tested by a closest-hit query (INTERFACE.md)."""
    vertices, faces = MESHES["icosphere"]
    origins, directions = random_rays(np.random.default_rng(37), vertices, 200)
    hits = tracer.build_accel(vertices, faces, kind="brute").intersect(origins, directions)
    assert np.all(hits.nodes == 0)
    assert np.all(hits.tris == len(faces))


# ---- structure invariants on random soups (hypothesis) ----

@st.composite
def triangle_soups(draw):
    """(vertices, faces): spread, clustered, duplicated (coincident centroids), coplanar, or raw floats."""
    count = draw(st.integers(1, 150))
    style = draw(st.sampled_from(["spread", "clustered", "duplicates", "coplanar", "raw"]))
    if style == "raw":
        corners = draw(hnp.arrays(np.float64, (count, 3, 3),
                                  elements=st.floats(-100.0, 100.0, allow_nan=False, width=32)))
    else:
        rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
        corners = rng.uniform(-1.0, 1.0, (count, 3, 3)) * (10.0 ** rng.uniform(-3.0, 3.0))
        if style == "clustered":
            corners = corners * 1e-3 + rng.integers(0, 3, (count, 1, 3))
        elif style == "duplicates":
            corners[:] = corners[0]
        elif style == "coplanar":
            corners[:, :, 2] = 0.5
    vertices = float32_exact(corners.reshape(-1, 3))
    return vertices, np.arange(len(vertices)).reshape(-1, 3)


class Node:
    """One node of a BVH, whatever its record layout: a box, and child nodes or a range of references."""

    def __init__(self, lo, hi, depth, first=0, count=0):
        self.lo, self.hi, self.depth = np.asarray(lo, np.float64), np.asarray(hi, np.float64), depth
        self.first, self.count, self.children = int(first), int(count), []


def decode_bvh(tree) -> list:
    """Every node of the tree, root first, read from its documented record layout.

    8-word binary records (tracer/accel/tree.py): box, then right child or first reference, then count
    (0 = inner); left child = record + 1. 32-word 4-wide records (tracer/accel/bvh.py): lane k's box at
    words 8a + k (lo) and 8a + 4 + k (hi) of axis a, its child record or first reference at 24 + k, its
    count at 28 + k (0 inner, -1 unused lane); such a record is a node whose box is the union of its
    lanes, and each lane holding references is a leaf node.
    """
    f, i = tree.nodes_f.astype(np.float64), tree.nodes_i
    nodes, seen = [], set()

    def read(record, depth):
        assert 0 <= record < len(i) and record not in seen, f"record {record} out of range or reached twice"
        seen.add(record)
        if i.shape[1] == 8:
            node = Node(f[record, 0:3], f[record, 3:6], depth)
            nodes.append(node)
            if i[record, 7] > 0:
                node.first, node.count = int(i[record, 6]), int(i[record, 7])
            else:
                assert record + 1 < i[record, 6], "depth-first order: left = record + 1 < right"
                node.children = [read(record + 1, depth + 1), read(int(i[record, 6]), depth + 1)]
            return node
        assert i.shape[1] == 32, f"unknown BVH record layout of {i.shape[1]} words"
        lanes = [k for k in range(4) if i[record, 28 + k] >= 0]
        assert lanes, f"record {record} has no lane"
        lo = np.array([[f[record, 8 * a + k] for a in range(3)] for k in lanes])
        hi = np.array([[f[record, 8 * a + 4 + k] for a in range(3)] for k in lanes])
        node = Node(lo.min(axis=0), hi.max(axis=0), depth)
        nodes.append(node)
        for lane_lo, lane_hi, k in zip(lo, hi, lanes, strict=True):
            if i[record, 28 + k] > 0:
                child = Node(lane_lo, lane_hi, depth + 1, i[record, 24 + k], i[record, 28 + k])
                nodes.append(child)
            else:
                assert i[record, 24 + k] > record, "depth-first order: children after their parent"
                child = read(int(i[record, 24 + k]), depth + 1)
                # The lane's box is the one a ray tests before entering the child: it must bound it.
                assert np.all(lane_lo <= child.lo) and np.all(lane_hi >= child.hi)
            node.children.append(child)
        return node

    read(0, 0)
    assert len(seen) == len(i), "unreachable records"
    return nodes


def box_area(lo, hi):
    extent = np.maximum(hi - lo, 0.0)
    x, y, z = extent[..., 0], extent[..., 1], extent[..., 2]
    return 2.0 * (x * y + y * z + z * x)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(soup=triangle_soups(), build=st.sampled_from(["sah", "median"]), leaf_size=st.integers(1, 8))
def test_bvh_invariants(soup, build, leaf_size):
    vertices, faces = soup
    accel = tracer.build_accel(vertices, faces, kind="bvh", build=build, leaf_size=leaf_size)
    tree = accel.tree
    nodes = decode_bvh(tree)
    leaves = [node for node in nodes if not node.children]
    inner = [node for node in nodes if node.children]
    # Every node's box bounds its children's boxes (the defining property of a BVH; common practice).
    for node in inner:
        assert node.count == 0
        for child in node.children:
            assert np.all(node.lo <= child.lo) and np.all(node.hi >= child.hi)
    # Leaves hold contiguous reference ranges that together cover every reference once ...
    ranges = sorted((leaf.first, leaf.count) for leaf in leaves)
    assert all(count >= 1 for _, count in ranges)
    assert np.array_equal(np.concatenate([np.arange(first, first + count) for first, count in ranges]),
                          np.arange(len(tree.refs)))
    # ... and every triangle is referenced exactly once.
    assert np.array_equal(np.sort(tree.refs), np.arange(len(faces)))
    # The leaf copies are the referenced triangles, and each leaf box bounds them.
    corners = vertices[faces[tree.refs]]
    assert np.array_equal(tree.leaf_tris.astype(np.float64).reshape(-1, 3, 3), corners)
    centroids = corners.mean(axis=1)
    for leaf in leaves:
        held = corners[leaf.first:leaf.first + leaf.count].reshape(-1, 3)
        assert np.all(leaf.lo <= held) and np.all(leaf.hi >= held)
        # A node with more than leaf_size triangles is split, unless all their centroids coincide.
        assert leaf.count <= leaf_size or np.all(centroids[leaf.first:leaf.first + leaf.count]
                                                 == centroids[leaf.first])
    # "build" statistics (INTERFACE.md), recomputed from the decoded tree.
    stats = accel.stats()
    for key in ("seconds", "nodes", "leaves", "depth_max", "sah_cost", "references_per_triangle"):
        assert key in stats
    assert stats["nodes"] == len(nodes)
    assert stats["leaves"] == len(leaves)
    assert stats["depth_max"] == max(leaf.depth for leaf in leaves)
    assert stats["references_per_triangle"] == 1.0
    root_area = box_area(nodes[0].lo, nodes[0].hi)
    if root_area > 0.0:
        # SAH cost of the tree, MacDonald & Booth (1990), The Visual Computer 6(3): expected cost of a
        # ray through the root, C_t sum_inner A/A_root + C_i sum_leaf N A/A_root, with the tree's constants.
        constants = stats.get("sah_constants", {"traverse": 1.0, "intersect": 1.0})
        inner_area = sum(box_area(n.lo, n.hi) for n in inner)
        leaf_work = sum(n.count * box_area(n.lo, n.hi) for n in leaves)
        expected = (constants["traverse"] * inner_area + constants["intersect"] * leaf_work) / root_area
        assert stats["sah_cost"] == pytest.approx(expected, rel=SUM_RTOL)


# Found by hypothesis: a triangle with a vertex at the origin next to a triangle collapsed onto that
# vertex; axis-parallel rays aimed at the collapsed one run along the box planes x = 0 and y = 0.
CORNER_AND_POINT = (np.array([[0.0, 0.0, 0.0]] * 4 + [[1.0, 0.0, 0.0], [0.0, 1.0, 0.0]]),
                    np.array([[0, 1, 2], [3, 4, 5]]))


ORIGIN_ON_SURFACE_ULPS = 32      # float32 epsilons of scene scale within which an origin is "on" a surface


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(soup=triangle_soups(), build=st.sampled_from(["sah", "median"]), seed=st.integers(0, 2**32 - 1))
@example(soup=CORNER_AND_POINT, build="sah", seed=1)
def test_bvh_matches_brute_force_on_soups(soup, build, seed):
    vertices, faces = soup
    rng = np.random.default_rng(seed)
    origins, directions = random_rays(rng, vertices, 128)
    axis_origins, axis_directions = axis_parallel_rays(rng, vertices, faces, 64)
    origins = np.concatenate([origins, axis_origins])
    directions = np.concatenate([directions, axis_directions])
    reference = tracer.build_accel(vertices, faces, kind="brute").intersect(origins, directions)
    hits = tracer.build_accel(vertices, faces, kind="bvh", build=build).intersect(origins, directions)
    hit, ref_hit = np.isfinite(hits.t), np.isfinite(reference.t)
    # A hit closer than float32 resolution of the scene means the origin lies on the surface to within
    # rounding: either answer is right there (which is why the renderer offsets its ray origins; common
    # practice). Every other hit/miss disagreement is a bug.
    centre, size = scene_scale(vertices)
    scale = size + np.linalg.norm(origins - centre, axis=1)
    resolution = ORIGIN_ON_SURFACE_ULPS * np.finfo(np.float32).eps * scale
    nearest = np.minimum(np.where(hit, hits.t, np.inf), np.where(ref_hit, reference.t, np.inf))
    grazing_origin = nearest <= resolution
    bad = np.flatnonzero((hit != ref_hit) & ~grazing_origin)
    assert len(bad) == 0, (f"{len(bad)} hit/miss disagreements with brute force, e.g. origin "
                           f"{origins[bad[0]].tolist()} direction {directions[bad[0]].tolist()}: "
                           f"t {hits.t[bad[0]]} vs {reference.t[bad[0]]}")
    same = hits.triangle == reference.triangle
    assert np.array_equal(hits.t[same], reference.t[same])
    # Different triangles only where two meet at one distance (shared edges, duplicates, crossings).
    same |= grazing_origin
    assert np.all(np.abs(hits.t[~same] - reference.t[~same]) <= DISTANCE_RTOL * scale[~same])


def test_brute_statistics():
    """INTERFACE.md: brute reports nodes 0 and one leaf."""
    vertices, faces = MESHES["soup"]
    stats = tracer.build_accel(vertices, faces, kind="brute").stats()
    for key in ("seconds", "nodes", "leaves", "depth_max", "sah_cost", "references_per_triangle"):
        assert key in stats
    assert stats["nodes"] == 0 and stats["leaves"] == 1 and stats["references_per_triangle"] == 1.0


# ---- watertightness ----

WATERTIGHT_RAYS = 1_000_000


def test_rays_from_inside_a_closed_mesh_never_escape():
    """Woop, Benthin & Wald 2013 (JCGT 2(1)), the method under test: rays from inside a closed mesh always
    hit it, including rays aimed exactly at vertices (float32 vertex = direction from the centre) and at
    edge midpoints, where a non-watertight test lets rays slip between neighbouring triangles."""
    mesh = trimesh.creation.icosphere(subdivisions=4)            # closed, 5120 triangles
    assert mesh.is_watertight
    vertices, faces = float32_exact(mesh.vertices), np.asarray(mesh.faces)
    edges = mesh.edges_unique
    midpoints = float32_exact(0.5 * (vertices[edges[:, 0]] + vertices[edges[:, 1]]))
    targets = np.concatenate([vertices, midpoints])
    rng = np.random.default_rng(41)
    # Distance of the nearest facet plane from the centre: everything within it is inside the mesh.
    normals = mesh.face_normals
    inner_radius = float(np.min(np.abs(np.einsum("ij,ij->i", normals, vertices[faces[:, 0]]))))
    n_random = WATERTIGHT_RAYS - 2 * len(targets)
    inside = unit(rng.normal(size=(n_random + len(targets), 3)))
    inside *= (0.95 * inner_radius * rng.random(len(inside)) ** (1.0 / 3.0))[:, None]
    inside = float32_exact(inside)
    origins = np.concatenate([np.zeros_like(targets), inside])
    directions = np.concatenate([targets, float32_exact(targets - inside[:len(targets)]),
                                 rng.normal(size=(n_random, 3))])
    assert len(origins) == WATERTIGHT_RAYS
    aimed = slice(0, 2 * len(targets))
    for spec in ("bvh", "bvh:median", "brute"):
        accel = tracer.build_accel(vertices, faces, kind=spec)
        select = slice(None) if spec == "bvh" else aimed       # brute force: only the aimed rays
        hits = accel.intersect(origins[select], directions[select])
        escaped = np.flatnonzero(~np.isfinite(hits.t))
        assert len(escaped) == 0, (f"{spec}: {len(escaped)} rays escaped, e.g. origin "
                                   f"{origins[select][escaped[0]].tolist()} direction "
                                   f"{directions[select][escaped[0]].tolist()}")
        # The hit points lie on the shell (between the inner facet radius and the vertex radius 1).
        radius = np.linalg.norm(origins[select] + hits.t[:, None] * directions[select], axis=1)
        assert np.all(radius >= inner_radius * (1.0 - DISTANCE_RTOL))
        assert np.all(radius <= 1.0 + DISTANCE_RTOL)

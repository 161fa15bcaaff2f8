"""The linear BVH (`bvh:lbvh`, tracer/accel/lbvh.py), checked against references outside the builder.

- Morton codes (Morton 1966, IBM technical report, the origin of the order; the bit interleaving of
  Lauterbach et al. 2009, section 3.1, common practice) against values worked out by hand.
- The tree: every triangle in exactly one leaf, every box inside its parent's, leaves of at most
  `leaf_size` triangles (also where all centroids coincide: ties are split by count).
- Closest hits against brute force (bit-identical t, u, v and the same triangle, as for the other BVH
  builds in tests/test_accel.py) and against trimesh's RayMeshIntersector on random rays.
"""
import numpy as np
import pytest
import trimesh
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from test_accel import (
    EDGE_BARYCENTRIC,
    GRAZING_FRACTION,
    MESHES,
    RAYS,
    assert_same_closest_hits,
    axis_parallel_rays,
    decode_bvh,
    float32_exact,
    grazes_edge,
    hits_agree,
    random_rays,
    scene_scale,
    triangle_soups,
)
from trimesh.ray.ray_triangle import RayMeshIntersector

import tracer
from tracer.accel import parse_spec
from tracer.accel.lbvh import interleave3, key_layout

SPEC = "bvh:lbvh"


def test_morton_interleaving_by_hand():
    """Morton order (Morton 1966): bit i of x, y, z lands at bits 3i + 2, 3i + 1, 3i of the code."""
    # Unit cells: x is the most significant bit of each triple, then y, then z.
    assert interleave3(1, 0, 0) == 0b100
    assert interleave3(0, 1, 0) == 0b010
    assert interleave3(0, 0, 1) == 0b001
    # x = 5 = 101b, y = 3 = 011b, z = 6 = 110b. Triples from bit 2 down to bit 0 (x_i y_i z_i):
    # i = 2: 1 0 1; i = 1: 0 1 1; i = 0: 1 1 0  ->  101 011 110b = 256 + 64 + 16 + 8 + 4 + 2 = 350.
    assert interleave3(5, 3, 6) == 350
    # x = 2 = 10b, y = 0, z = 3 = 11b: i = 1: 1 0 1; i = 0: 0 0 1 -> 101 001b = 32 + 8 + 1 = 41.
    assert interleave3(2, 0, 3) == 41
    # The highest of 21 bits per axis: x bit 20 -> code bit 62; all 63 bits set for the last cell.
    assert interleave3(1 << 20, 0, 0) == 1 << 62
    assert interleave3((1 << 21) - 1, (1 << 21) - 1, (1 << 21) - 1) == (1 << 63) - 1


def test_key_layout_fits_one_int64():
    # Indices 0 .. 999,999 < 2^20 = 1,048,576 need 20 bits: (63 - 20) // 3 = 14 bits per axis (42-bit code).
    # 0 .. 4,999,999 < 2^23 = 8,388,608: 23 bits, (63 - 23) // 3 = 13 per axis. 2^31 triangles: 31 bits,
    # (63 - 31) // 3 = 10 per axis, the 30-bit code of Lauterbach et al. One triangle: index bits are at
    # least 1, (63 - 1) // 3 = 20 per axis.
    assert key_layout(1_000_000) == (14, 20)
    assert key_layout(5_000_000) == (13, 23)
    assert key_layout(2**31) == (10, 31)
    assert key_layout(1) == (20, 1)


def test_triangles_follow_the_morton_order():
    """Eight small triangles, one at each corner of a cube, in scrambled order: the tree's references
    follow the Morton order of the corners, 4x + 2y + z (Morton 1966; the interleaving above)."""
    corners = np.array([(x, y, z) for x in (0, 1) for y in (0, 1) for z in (0, 1)], np.float64)
    scrambled = np.random.default_rng(3).permutation(8)
    tiny = np.array([[0.0, 0.0, 0.0], [0.01, 0.0, 0.0], [0.0, 0.01, 0.0]])
    vertices = float32_exact((corners[scrambled][:, None, :] + tiny).reshape(-1, 3))
    faces = np.arange(24).reshape(-1, 3)
    tree = tracer.build_accel(vertices, faces, SPEC, leaf_size=1).tree
    morton = corners[scrambled] @ np.array([4.0, 2.0, 1.0])
    assert np.array_equal(morton[tree.refs], np.arange(8.0))


def test_spec_is_accepted():
    assert parse_spec(SPEC) == ("bvh", "lbvh")
    vertices, faces = MESHES["icosphere"]
    stats = tracer.build_accel(vertices, faces, SPEC).stats()
    assert stats["build_method"] == "lbvh" and stats["kind"] == "bvh"


def assert_valid_tree(vertices, faces, leaf_size):
    """BVH invariants (common practice): child boxes inside the parent's, leaves bounding their triangles,
    every triangle in exactly one leaf, no leaf above leaf_size."""
    tree = tracer.build_accel(vertices, faces, SPEC, leaf_size=leaf_size).tree
    nodes = decode_bvh(tree)        # also checks each lane's box bounds the record below it
    leaves = [node for node in nodes if not node.children]
    for node in nodes:
        for child in node.children:
            assert np.all(node.lo <= child.lo) and np.all(node.hi >= child.hi)
    ranges = sorted((leaf.first, leaf.count) for leaf in leaves)
    assert np.array_equal(np.concatenate([np.arange(first, first + count) for first, count in ranges]),
                          np.arange(len(tree.refs)))
    assert np.array_equal(np.sort(tree.refs), np.arange(len(faces)))
    corners = vertices[faces[tree.refs]]
    assert np.array_equal(tree.leaf_tris.astype(np.float64).reshape(-1, 3, 3), corners)
    for leaf in leaves:
        assert 1 <= leaf.count <= leaf_size
        held = corners[leaf.first:leaf.first + leaf.count].reshape(-1, 3)
        assert np.all(leaf.lo <= held) and np.all(leaf.hi >= held)


@pytest.mark.parametrize("leaf_size", (1, 4))
@pytest.mark.parametrize("mesh", sorted(MESHES))
def test_tree_is_valid(mesh, leaf_size):
    assert_valid_tree(*MESHES[mesh], leaf_size)


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(soup=triangle_soups(), leaf_size=st.integers(1, 8))
def test_tree_is_valid_on_soups(soup, leaf_size):
    """Random soups, including all-equal centroids (the "duplicates" style: ties split by count)."""
    assert_valid_tree(*soup, leaf_size)


@pytest.mark.parametrize("rays", ("random", "axis_parallel"))
@pytest.mark.parametrize("mesh", sorted(MESHES))
def test_hits_match_brute_force(mesh, rays):
    """Brute force is the definition of the closest hit; the same triangle through the same arithmetic
    gives bit-identical t, u, v (INTERFACE.md: structures differ only where they return other hits)."""
    vertices, faces = MESHES[mesh]
    rng = np.random.default_rng(29)
    make = random_rays if rays == "random" else axis_parallel_rays
    origins, directions = make(rng, vertices, RAYS) if rays == "random" else make(rng, vertices, faces, RAYS)
    reference = tracer.build_accel(vertices, faces, kind="brute").intersect(origins, directions)
    hits = tracer.build_accel(vertices, faces, SPEC).intersect(origins, directions)
    assert np.count_nonzero(np.isfinite(reference.t)) > 0.1 * RAYS
    ties = assert_same_closest_hits(hits, reference, origins, directions, vertices, faces)
    if rays == "random":
        assert ties <= GRAZING_FRACTION * RAYS


@pytest.mark.parametrize("mesh", sorted(MESHES))
def test_hits_match_trimesh(mesh):
    """Reference: trimesh.ray.ray_triangle.RayMeshIntersector (a general-purpose library), closest hits
    along unit rays; it and we may disagree only on rays grazing a triangle edge (see test_accel.py)."""
    vertices, faces = MESHES[mesh]
    origins, directions = random_rays(np.random.default_rng(31), vertices, RAYS)
    tri, ray, location = RayMeshIntersector(trimesh.Trimesh(vertices, faces, process=False)).intersects_id(
        origins, directions, multiple_hits=False, return_locations=True)
    ref_t = np.full(RAYS, np.inf)
    ref_t[ray] = np.einsum("ij,ij->i", location - origins[ray], directions[ray])
    ref_triangle = np.full(RAYS, -1)
    ref_triangle[ray] = tri
    hits = tracer.build_accel(vertices, faces, SPEC).intersect(origins, directions)
    centre, size = scene_scale(vertices)
    agree = hits_agree(hits.t, ref_t, size + np.linalg.norm(origins - centre, axis=1))
    graze = (grazes_edge(origins, directions, vertices, faces, hits.triangle)
             | grazes_edge(origins, directions, vertices, faces, ref_triangle))
    assert 0.2 * RAYS < np.count_nonzero(ref_triangle >= 0) < RAYS
    assert np.count_nonzero(~agree) <= GRAZING_FRACTION * RAYS
    assert np.all(graze[~agree]), f"a disagreement with trimesh farther than {EDGE_BARYCENTRIC} from an edge"
    assert np.all((hits.triangle == ref_triangle)[agree & ~graze])


def degenerate_meshes():
    one = np.array([[0.0, 0.0, 0.0], [1.0, 0.0, 0.0], [0.0, 1.0, 0.0]])
    two = np.concatenate([one, one + [0.0, 0.0, 0.5]])
    # 40 different triangles (p, -p, q) with |q| <= |p| per axis: each box is [-|p|, |p|], so every box
    # centre, the point the builder quantises, is exactly 0 and all Morton codes are equal.
    rng = np.random.default_rng(5)
    p = rng.normal(size=(40, 3))
    q = p * rng.uniform(-1.0, 1.0, (40, 3))
    same_centre = np.stack([p, -p, q], axis=1).reshape(-1, 3)
    return {"one": one, "two": two, "same_centre": same_centre}


@pytest.mark.parametrize("leaf_size", (1, 4))
@pytest.mark.parametrize("name", ("one", "two", "same_centre"))
def test_degenerate_inputs_build_and_trace(name, leaf_size):
    vertices = float32_exact(degenerate_meshes()[name])
    faces = np.arange(len(vertices)).reshape(-1, 3)
    box_centres = vertices[faces].min(axis=1) + vertices[faces].max(axis=1)
    assert name != "same_centre" or not box_centres.any()
    assert_valid_tree(vertices, faces, leaf_size)
    origins, directions = random_rays(np.random.default_rng(37), vertices, 256)
    reference = tracer.build_accel(vertices, faces, kind="brute").intersect(origins, directions)
    hits = tracer.build_accel(vertices, faces, SPEC, leaf_size=leaf_size).intersect(origins, directions)
    assert np.count_nonzero(np.isfinite(reference.t)) > 0
    assert_same_closest_hits(hits, reference, origins, directions, vertices, faces)

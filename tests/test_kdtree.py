"""kd-tree: agreement with brute force and with trimesh, the classic kd-tree edge cases, statistics.

References outside the code: brute force (every ray against every triangle, `kind="brute"`), trimesh's
general-purpose ray/mesh intersector (float64, its own algorithm), geometry with a known answer (closed
meshes, axis-aligned boxes), and hand arithmetic for the SAH cost (MacDonald & Booth 1990).
"""
from fractions import Fraction

import numpy as np
import pytest
import trimesh
from hypothesis import given, settings
from hypothesis import strategies as st
from trimesh.ray.ray_triangle import RayMeshIntersector

import tracer
from tracer.accel import kdtree
from tracer.accel._kdbuild import INLINE_COUNT_BITS, INLINE_SHIFT, LEAF, META_WORD, SLOTS
from tracer.accel.kdtree import binary_nodes, build_kdtree, cells, depth_limit, kdtree_stats, tree_from_binary
from tracer.accel.tree import KDTREE, leaf_triangles

T_RELATIVE = 1e-5       # float32 kernels against float32 brute force / float64 trimesh: relative error on t
BUILDS = ("sah", "median")


# ---------------------------------------------------------------------------------------------- scenes
def sphere(subdivisions=3):
    mesh = trimesh.creation.icosphere(subdivisions=subdivisions)
    return np.asarray(mesh.vertices), np.asarray(mesh.faces)


def box_grid():
    """Axis-aligned unit cubes on a 3 x 3 grid with gaps, on an axis-aligned floor: many coplanar faces."""
    parts = []
    for i in range(3):
        for j in range(3):
            cube = trimesh.creation.box(extents=(1.0, 1.0 + 0.5 * i, 1.0))
            cube.apply_translation((2.0 * i, 0.5 * (1.0 + 0.5 * i), 2.0 * j))
            parts.append(cube)
    floor = trimesh.creation.box(extents=(8.0, 0.25, 8.0))
    floor.apply_translation((2.0, -0.125, 2.0))
    parts.append(floor)
    mesh = trimesh.util.concatenate(parts)
    return np.asarray(mesh.vertices), np.asarray(mesh.faces)


def straddling_scene():
    """A fine sphere pierced by a few large triangles that every split of the sphere's cells cuts."""
    v, f = sphere(3)
    big_v = np.array([[-1.5, -1.5, 0.1], [1.5, -1.5, 0.2], [0.0, 1.5, -0.1],
                      [-1.5, 0.3, -1.5], [1.5, -0.2, -1.5], [0.1, 0.1, 1.5]])
    big_f = np.array([[0, 1, 2], [3, 4, 5]]) + len(v)
    return np.vstack([v, big_v]), np.vstack([f, big_f])


def random_directions(rng, n):
    d = rng.normal(size=(n, 3))
    return d / np.linalg.norm(d, axis=1, keepdims=True)


def assert_same_hits(hits, reference, label):
    """Same hit/miss, and t within T_RELATIVE where both hit (which triangle may differ on ties)."""
    hit, ref_hit = np.isfinite(hits.t), np.isfinite(reference.t)
    bad = np.nonzero(hit != ref_hit)[0]
    assert len(bad) == 0, f"{label}: hit/miss differs on {len(bad)} rays, e.g. ray {bad[:5]}"
    both = hit & ref_hit
    err = np.abs(hits.t[both].astype(np.float64) - reference.t[both]) / np.maximum(reference.t[both], 1e-30)
    assert err.size == 0 or err.max() <= T_RELATIVE, f"{label}: t differs by {err.max():.3g} (relative)"


def trimesh_t(vertices, faces, origins, directions):
    """t of the first hit (inf on a miss) by trimesh's ray/triangle intersector, in float64."""
    mesh = trimesh.Trimesh(vertices, faces, process=False)
    locations, index_ray, _ = RayMeshIntersector(mesh).intersects_location(
        origins, directions, multiple_hits=False)
    t = np.full(len(origins), np.inf)
    t[index_ray] = np.linalg.norm(locations - origins[index_ray], axis=1) / np.linalg.norm(
        directions[index_ray], axis=1)
    return t


# ------------------------------------------------------------------------------- against the references
@pytest.mark.parametrize("build", BUILDS)
def test_camera_rays_match_brute_force_and_trimesh(build):
    # References: brute force (same triangle test, no structure) and trimesh (float64, independent code).
    # Rays aimed well inside or well outside the unit sphere's silhouette (impact parameter < 0.85 or
    # > 1.15), so trimesh's edge tolerance cannot flip a hit: all three must agree.
    v, f = sphere(3)
    rng = np.random.default_rng(7)
    n = 3000
    origins = 3.0 * random_directions(rng, n)
    impact = np.where(rng.random(n) < 0.7, rng.uniform(0.0, 0.85, n), rng.uniform(1.15, 2.0, n))
    side = np.cross(origins, random_directions(rng, n))
    side /= np.linalg.norm(side, axis=1, keepdims=True)
    directions = -origins + impact[:, None] * side
    kd = tracer.build_accel(v, f, kind="kdtree", build=build)
    brute = tracer.build_accel(v, f, kind="brute")
    hits = kd.intersect(origins, directions)
    assert_same_hits(hits, brute.intersect(origins, directions), "kd vs brute")
    t_ref = trimesh_t(v, f, origins, directions)
    assert np.array_equal(np.isfinite(hits.t), np.isfinite(t_ref))
    assert np.array_equal(np.isfinite(t_ref), impact < 1.0)   # geometry: the sphere's silhouette
    ok = np.isfinite(t_ref)
    assert np.max(np.abs(hits.t[ok] - t_ref[ok]) / t_ref[ok]) <= T_RELATIVE


@pytest.mark.parametrize("build", BUILDS)
def test_rays_starting_inside_cells_match_brute_force_and_trimesh(build):
    # Origins scattered through the scene box (inside and outside the sphere, so inside leaf cells at
    # every depth), random directions; reference: brute force and trimesh as above. Every origin inside
    # the closed sphere must hit it (common practice: a closed surface separates inside from outside).
    v, f = sphere(3)
    rng = np.random.default_rng(11)
    n = 3000
    origins = rng.uniform(-1.2, 1.2, size=(n, 3))
    directions = random_directions(rng, n)
    kd = tracer.build_accel(v, f, kind="kdtree", build=build)
    hits = kd.intersect(origins, directions)
    brute = tracer.build_accel(v, f, kind="brute")
    assert_same_hits(hits, brute.intersect(origins, directions), "kd vs brute")
    inside = np.linalg.norm(origins, axis=1) < 0.9       # the icosphere's inradius is above 0.98
    assert np.all(np.isfinite(hits.t[inside]))
    t_ref = trimesh_t(v, f, origins[inside], directions[inside])
    assert np.max(np.abs(hits.t[inside] - t_ref) / t_ref) <= T_RELATIVE


@pytest.mark.parametrize("build", BUILDS)
def test_rays_from_inside_a_closed_sphere_never_escape(build):
    # Watertightness (Woop, Benthin & Wald 2013) must survive the kd-tree: no ray from inside a closed
    # mesh gets out, including axis-parallel rays and rays through mesh vertices (common practice).
    v, f = sphere(4)
    rng = np.random.default_rng(3)
    n = 20000
    origins = rng.uniform(-0.5, 0.5, size=(n, 3))
    directions = random_directions(rng, n)
    directions[:3000] = np.eye(3)[rng.integers(0, 3, 3000)] * rng.choice([-1.0, 1.0], (3000, 1))
    origins[3000:4000] = 0.0
    directions[3000:4000] = v[rng.integers(0, len(v), 1000)]   # from the centre through vertices
    hits = tracer.build_accel(v, f, kind="kdtree", build=build).intersect(origins, directions)
    assert np.all(np.isfinite(hits.t))


@pytest.mark.parametrize("build", BUILDS)
def test_rays_along_split_planes(build):
    # The classic kd-tree edge case (common practice): rays lying exactly in a split plane, parallel to
    # it (d[axis] = +0 or -0), axis-aligned along an axis-aligned box face or oblique in the plane, and
    # rays starting on a split plane and leaving it. Reference: brute force.
    v, f = box_grid()
    kd = tracer.build_accel(v, f, kind="kdtree", build=build)
    brute = tracer.build_accel(v, f, kind="brute")
    nodes_f, nodes_i = binary_nodes(kd.tree)
    inner = nodes_i[:, 0] != LEAF
    planes = np.unique(np.stack([nodes_i[inner, 0], nodes_f[inner, 1]], axis=1), axis=0)
    assert len(planes) > 5
    rng = np.random.default_rng(5)
    lo, hi = kd.tree.bounds[:3] - 0.5, kd.tree.bounds[3:] + 0.5
    origins, directions = [], []
    for axis_f, split in planes:
        axis = int(axis_f)
        for _ in range(40):
            o = rng.uniform(lo, hi)
            o[axis] = split
            d = np.zeros(3)
            if rng.random() < 0.5:
                d[rng.choice([a for a in range(3) if a != axis])] = rng.choice([-1.0, 1.0])
            else:
                d = rng.normal(size=3)
            d[axis] = -0.0 if rng.random() < 0.5 else 0.0          # in the plane
            origins.append(o)
            directions.append(d)
            leaving = rng.normal(size=3)                            # from the plane, off it
            origins.append(o)
            directions.append(leaving)
    origins = np.array(origins, np.float32)
    directions = np.array(directions, np.float32)
    hits = kd.intersect(origins, directions)
    reference = brute.intersect(origins, directions)
    assert_same_hits(hits, reference, "rays along split planes")
    assert np.count_nonzero(np.isfinite(reference.t)) > len(origins) // 4   # the check is not vacuous


def test_triangles_lying_in_split_planes_are_found():
    # Box faces lie in the planes the SAH picks (their bounds are split candidates): check such planes
    # exist in the built tree, then aim rays across each plane at the centres of the triangles lying in
    # it, from both sides. They must hit at the plane, as brute force does (common practice).
    v, f = box_grid()
    kd = tracer.build_accel(v, f, kind="kdtree", build="sah")
    brute = tracer.build_accel(v, f, kind="brute")
    nodes_f, nodes_i = binary_nodes(kd.tree)
    corners = v.astype(np.float32)[f]
    inner = np.nonzero(nodes_i[:, 0] != LEAF)[0]
    origins, directions, expected = [], [], []
    for n in inner:
        axis, split = nodes_i[n, 0], nodes_f[n, 1]
        in_plane = np.nonzero(np.all(corners[:, :, axis] == split, axis=1))[0]
        for tri in in_plane:
            centre = corners[tri].mean(axis=0).astype(np.float64)
            for sign in (-1.0, 1.0):
                d = np.zeros(3)
                d[axis] = -sign
                o = centre.copy()
                o[axis] = split + sign * 0.01
                origins.append(o)
                directions.append(d)
                expected.append(0.01)
    assert len(origins) > 10, "the SAH put no split in the plane of a box face"
    origins = np.array(origins)
    directions = np.array(directions)
    hits = kd.intersect(origins, directions)
    assert_same_hits(hits, brute.intersect(origins, directions), "planar triangles")
    # Faces are one or two apart from each other: the hit is the face in the plane, 0.01 away.
    assert np.allclose(hits.t, expected, rtol=1e-3)


@pytest.mark.parametrize("build", BUILDS)
def test_any_hit_agrees_with_closest_hit(build):
    # Definition: something lies in (0, t_max) iff the closest hit is below t_max.
    v, f = straddling_scene()
    rng = np.random.default_rng(13)
    n = 4000
    origins = rng.uniform(-1.6, 1.6, size=(n, 3))
    directions = random_directions(rng, n)
    directions[: n // 2] = rng.uniform(-0.5, 0.5, size=(n // 2, 3)) - origins[: n // 2]   # aimed inwards
    kd = tracer.build_accel(v, f, kind="kdtree", build=build)
    closest = kd.intersect(origins, directions)
    hit = np.isfinite(closest.t)
    assert np.count_nonzero(hit) > n // 2
    t_hit = np.where(hit, closest.t, 1.0)
    assert np.array_equal(np.isfinite(kd.occluded(origins, directions).t), hit)
    assert np.all(~np.isfinite(kd.occluded(origins, directions, t_max=0.5 * t_hit).t))
    assert np.array_equal(np.isfinite(kd.occluded(origins, directions, t_max=1.5 * t_hit).t), hit)


# --------------------------------------------------------------------------------------------- the build
def _triangle_overlaps_box(tri, lo, hi):
    """Separating-axis test of a triangle against an open box (Akenine-Moller 2001, "Fast 3D
    triangle-box overlap testing", Journal of Graphics Tools 6(1)): 13 axes, strict, in exact rational
    arithmetic so a triangle touching the box at a point or an edge counts as outside."""
    tri = [[Fraction(float(x)) for x in p] for p in tri]
    lo = [Fraction(float(x)) for x in lo]
    hi = [Fraction(float(x)) for x in hi]
    centre = [(a + b) / 2 for a, b in zip(lo, hi, strict=True)]
    half = [(b - a) / 2 for a, b in zip(lo, hi, strict=True)]
    p = [[x - c for x, c in zip(q, centre, strict=True)] for q in tri]

    def sub(a, b):
        return [x - y for x, y in zip(a, b, strict=True)]

    def cross(a, b):
        return [a[1] * b[2] - a[2] * b[1], a[2] * b[0] - a[0] * b[2], a[0] * b[1] - a[1] * b[0]]

    unit = [[1, 0, 0], [0, 1, 0], [0, 0, 1]]
    edges = [sub(p[1], p[0]), sub(p[2], p[1]), sub(p[0], p[2])]
    axes = unit + [cross(u, e) for u in unit for e in edges] + [cross(edges[0], edges[1])]
    for axis in axes:
        if not any(axis):
            continue
        proj = [sum(a * x for a, x in zip(axis, q, strict=True)) for q in p]
        radius = sum(abs(a) * h for a, h in zip(axis, half, strict=True))
        if min(proj) >= radius or max(proj) <= -radius:
            return False
    return True


@pytest.mark.parametrize("build", BUILDS)
def test_every_triangle_crossing_a_leaf_cell_is_referenced_there(build):
    # The build is conservative (the property behind every traversal result): a triangle overlapping the
    # open cell of a leaf, by the separating-axis test above, is among the leaf's references.
    v, f = straddling_scene()
    tree = build_kdtree(v, f, build=build)
    corners = v.astype(np.float32)[f].astype(np.float64)
    _, nodes_i, _, boxes = cells(tree)
    tri_lo, tri_hi = corners.min(axis=1), corners.max(axis=1)
    for n in np.nonzero(nodes_i[:, 0] == LEAF)[0]:
        lo, hi = boxes[n, :3].astype(np.float64), boxes[n, 3:].astype(np.float64)
        if np.any(hi <= lo):
            continue
        first, count = nodes_i[n, 2], nodes_i[n, 3]
        referenced = set(tree.refs[first:first + count].tolist())
        near = np.nonzero(np.all(tri_lo < hi, axis=1) & np.all(tri_hi > lo, axis=1))[0]
        for tri in near:
            if tri not in referenced:
                assert not _triangle_overlaps_box(corners[tri], lo, hi), f"leaf {n} lacks triangle {tri}"


@pytest.mark.parametrize("build", BUILDS)
def test_tree_shape(build):
    # Structural invariants of the layout (module docstring of tracer.accel.kdtree): children nest in
    # the parent's cell, depth stays within 8 + 1.3 log2 N, every triangle is referenced, leaves take
    # consecutive reference ranges, and packing the binary tree into records loses nothing.
    v, f = straddling_scene()
    tree = build_kdtree(v, f, build=build)
    assert tree.kind == KDTREE and tree.nodes_i.shape[1] == 32
    nodes_f, nodes_i, depth, boxes = cells(tree)
    assert depth.max() <= depth_limit(len(f))
    leaves = nodes_i[:, 0] == LEAF
    assert np.all(nodes_i[~leaves, 0] <= 2)
    for n in np.nonzero(~leaves)[0]:
        axis, split = nodes_i[n, 0], nodes_f[n, 1]
        assert boxes[n, axis] < split < boxes[n, 3 + axis]
        assert nodes_i[n, 2] > n + 1
    first, count = nodes_i[leaves, 2], nodes_i[leaves, 3]
    assert count.sum() == len(tree.refs)
    assert np.array_equal(first[count > 0], np.cumsum(count)[count > 0] - count[count > 0])
    assert np.array_equal(np.unique(tree.refs), np.arange(len(f)))
    assert np.array_equal(tree.leaf_tris, leaf_triangles(v, f, tree.refs))
    repacked = tree_from_binary(nodes_i, tree.refs, v.astype(np.float32)[f], tree.bounds)
    assert np.array_equal(repacked.nodes_i, tree.nodes_i)
    assert len(tree.nodes_i) < np.count_nonzero(~leaves)          # several kd nodes per record
    # A 128-byte record is two whole cache lines (64-byte lines: common practice on x86-64 and ARMv8).
    assert tree.nodes_i.ctypes.data % 64 == 0 and repacked.nodes_i.ctypes.data % 64 == 0
    assert tree.nodes_f.ctypes.data == tree.nodes_i.ctypes.data


@pytest.mark.parametrize("build", BUILDS)
def test_parallel_build_gives_the_serial_tree(build, monkeypatch):
    # The parallel build (cells of at most N / TOP_TASK_SHARE triangles built on worker threads, then
    # stitched) must give exactly the tree of one serial build: same records, same references.
    v, f = sphere(4)
    serial = build_kdtree(v, f, build=build)
    monkeypatch.setattr(kdtree, "PARALLEL_MIN_TRIANGLES", 1000)
    monkeypatch.setattr(kdtree, "TOP_TASK_SHARE", 16)
    parallel = build_kdtree(v, f, build=build)
    assert np.array_equal(parallel.nodes_i, serial.nodes_i)
    assert np.array_equal(parallel.refs, serial.refs)
    assert np.array_equal(parallel.leaf_tris, serial.leaf_tris)


# ----------------------------------------------------------------------------------------- statistics
def test_sah_cost_of_a_hand_built_tree():
    # MacDonald & Booth (1990): C = C_T * sum_inner A(n)/A(root) + C_I * sum_leaf N(l) A(l)/A(root),
    # C_T = C_I = 1. Root cell [0,2] x [0,1] x [0,1], split x = 1:
    #   A(root)  = 2 (2*1 + 1*1 + 1*2) = 10
    #   A(below) = A(above) = 2 (1 + 1 + 1) = 6     ([0,1]^3 and [1,2] x [0,1]^2)
    #   below holds 1 reference, above 2 (one triangle straddles x = 1, so 2 triangles, 3 references)
    #   C = 1 * 10/10 + (1 * 6 + 2 * 6) / 10 = 1 + 1.8 = 2.8
    v = np.array([[0.2, 0.2, 0.5], [0.8, 0.2, 0.5], [0.5, 0.8, 0.5],      # below only
                  [0.5, 0.1, 0.1], [1.5, 0.1, 0.9], [1.5, 0.9, 0.1]])     # straddles x = 1
    v = np.vstack([v, [[0.0, 0.0, 0.0], [2.0, 1.0, 1.0]]])                # the cell's corners
    f = np.array([[0, 1, 2], [3, 4, 5]])
    binary = np.zeros((3, 8), np.int32)                 # the binary layout of kdtree.binary_nodes
    binary[0, 0], binary[0, 1], binary[0, 2] = 0, np.float32(1.0).view(np.int32), 2
    binary[1, 0], binary[1, 2], binary[1, 3] = LEAF, 0, 1
    binary[2, 0], binary[2, 2], binary[2, 3] = LEAF, 1, 2
    refs = np.array([0, 1, 1], np.int32)
    tree = tree_from_binary(binary, refs, v.astype(np.float32)[f], np.array([0, 0, 0, 2, 1, 1], np.float32))
    assert np.array_equal(binary_nodes(tree)[1], binary)
    stats = kdtree_stats(tree, n_triangles=2)
    assert stats["sah_cost"] == pytest.approx(2.8)
    assert (stats["nodes"], stats["leaves"], stats["empty_leaves"], stats["depth_max"]) == (3, 2, 0, 1)
    assert stats["references_per_triangle"] == pytest.approx(1.5)
    assert stats["duplicated_references"] == 1
    assert stats["leaf_size_histogram"]["1"] == 1 and stats["leaf_size_histogram"]["2"] == 1
    # The kernel traces this hand-made tree too: a ray down the z axis through the straddler's part
    # in the above cell, and one through the below-only triangle (brute force gives the same).
    origins = np.array([[1.3, 0.5, 2.0], [0.5, 0.4, 2.0]], np.float32)
    directions = np.array([[0, 0, -1], [0, 0, -1]], np.float32)
    accel = tracer.accel.Accel(tree, "kdtree", "hand", 1, 2, 0.0)
    brute = tracer.build_accel(v, f, kind="brute")
    hits = accel.intersect(origins, directions)
    assert hits.triangle.tolist() == [1, 0]
    assert_same_hits(hits, brute.intersect(origins, directions), "hand-built tree")


@pytest.mark.parametrize("build", BUILDS)
def test_statistics_of_a_built_tree(build):
    v, f = straddling_scene()
    accel = tracer.build_accel(v, f, kind="kdtree", build=build)
    stats = accel.stats()
    tree = accel.tree
    for key in ("nodes", "leaves", "empty_leaves", "depth_max", "depth_mean_leaf", "leaf_size_histogram",
                "sah_cost", "references_per_triangle", "duplicated_references", "memory_bytes", "seconds"):
        assert key in stats
    # Every triangle is referenced at least once; the straddlers more than once (common practice).
    assert stats["references_per_triangle"] >= 1.0
    assert stats["duplicated_references"] == len(tree.refs) - len(f) > 0
    _, nodes_i = binary_nodes(tree)
    assert stats["leaves"] == np.count_nonzero(nodes_i[:, 0] == LEAF) == (stats["nodes"] + 1) // 2
    assert stats["empty_leaves"] == np.count_nonzero((nodes_i[:, 0] == LEAF) & (nodes_i[:, 3] == 0))
    assert stats["records"] == len(tree.nodes_i)
    assert sum(stats["leaf_size_histogram"].values()) == stats["leaves"]
    assert stats["memory_bytes"] == tree.nodes_i.nbytes + tree.refs.nbytes + tree.leaf_tris.nbytes
    # The SAH cost is at least the cost of the root visit plus one test per leaf area crossed.
    assert stats["sah_cost"] > 1.0


# ---------------------------------------------------------------------------------------------- mailboxing
def _leaves_crossed(nodes_i, boxes, origin, direction, t_end):
    """Leaves whose cell the segment o + t d, 0 <= t <= t_end, touches (naive slab test, float64,
    with a small margin so cells touched by rounding count too)."""
    leaves = np.nonzero(nodes_i[:, 0] == LEAF)[0]
    lo = boxes[leaves, :3].astype(np.float64) - 1e-5
    hi = boxes[leaves, 3:].astype(np.float64) + 1e-5
    with np.errstate(divide="ignore", invalid="ignore"):
        t0 = (lo - origin) / direction
        t1 = (hi - origin) / direction
    near = np.where(direction == 0.0, np.where((origin >= lo) & (origin <= hi), -np.inf, np.inf),
                    np.minimum(t0, t1))
    far = np.where(direction == 0.0, np.where((origin >= lo) & (origin <= hi), np.inf, -np.inf),
                   np.maximum(t0, t1))
    t_near = np.maximum(near.max(axis=1), 0.0)
    t_far = np.minimum(far.min(axis=1), t_end)
    return leaves[t_near <= t_far]


def test_mailboxing_tests_each_triangle_once():
    # Mailboxing (Amanatides & Woo 1987): a ray tests a triangle at most once, however many leaves
    # reference it, so triangles tested <= distinct triangles in the leaves the ray crosses up to its
    # hit, while those leaves hold more references than distinct triangles (the straddlers).
    v, f = straddling_scene()
    accel = tracer.build_accel(v, f, kind="kdtree", build="sah")
    tree = accel.tree
    _, nodes_i, _, boxes = cells(tree)
    rng = np.random.default_rng(17)
    n = 300
    origins = 2.0 * random_directions(rng, n)
    directions = rng.uniform(-1.0, 1.0, size=(n, 3)) - origins      # through the sphere and the big triangles
    hits = accel.intersect(origins, directions)
    duplicated_rays = 0
    for i in range(n):
        t_end = hits.t[i] if np.isfinite(hits.t[i]) else np.inf
        crossed = _leaves_crossed(nodes_i, boxes, origins[i], directions[i], t_end * (1 + 1e-5))
        refs = np.concatenate([tree.refs[nodes_i[k, 2]:nodes_i[k, 2] + nodes_i[k, 3]]
                               for k in crossed] + [np.zeros(0, np.int32)])
        distinct = len(np.unique(refs))
        assert hits.tris[i] <= distinct, f"ray {i}: {hits.tris[i]} tests, {distinct} distinct triangles"
        duplicated_rays += len(refs) > distinct
    assert duplicated_rays > n // 10, "too few rays cross duplicated references for the check to bite"


def test_exactly_the_leaves_holding_duplicated_triangles_take_the_mailbox():
    # The mailbox only matters for a triangle referenced by two leaves or more (common practice: a
    # leaf is visited at most once per ray, so only duplicates can repeat); the build flags exactly the
    # leaves holding one (layout: tracer.accel.kdtree), and the walk skips the mailbox for the others.
    # Small separate triangles on a lattice (one leaf each, no duplicates) and a big one across them.
    grid = np.stack(np.meshgrid(*[np.arange(8.0)] * 3, indexing="ij"), axis=-1).reshape(-1, 1, 3)
    small = grid + np.array([[0.0, 0.0, 0.0], [0.2, 0.0, 0.0], [0.0, 0.2, 0.1]])
    big = np.array([[[-0.5, -0.5, 3.5], [8.0, -0.5, 3.6], [-0.5, 8.0, 3.4]]])
    corners = np.concatenate([small, big]).reshape(-1, 3)
    v, f = corners, np.arange(len(corners)).reshape(-1, 3)
    tree = build_kdtree(v, f, build="sah")
    duplicated = np.bincount(tree.refs)[tree.refs] > 1
    flags = []
    for r in range(len(tree.nodes_i)):
        record = tree.nodes_i[r].astype(np.int64)
        if record[META_WORD] < 0:                                   # a leaf record
            first, count, flag = record[SLOTS], record[SLOTS + 1], record[SLOTS + 2]
            flags.append((first, count, flag))
            continue
        for link in record[SLOTS:]:
            if link <= -2:                                          # a leaf kept in the link word
                code = -2 - link
                flags.append((code >> INLINE_SHIFT, code & 7, (code >> INLINE_COUNT_BITS) & 1))
    assert sum(count for _, count, _ in flags) == len(tree.refs)     # every leaf seen once
    assert any(flag for *_, flag in flags) and not all(flag for *_, flag in flags)
    for first, count, flag in flags:
        assert flag == int(duplicated[first:first + count].any())


# ---------------------------------------------------------------------------------------------- hypothesis
GRID = st.sampled_from([-1.0, -0.5, 0.0, 0.25, 0.5, 1.0])          # shared values: coplanar, axis-parallel
COORD = st.one_of(GRID, st.floats(-1.0, 1.0, width=32))
DIRECTION = st.one_of(st.sampled_from([0.0, -0.0, 1.0, -1.0, 0.5]), st.floats(-1.0, 1.0, width=32))


def _exact_closest_t(corners, origin, direction):
    """Closest hit distance (Fraction; None on a miss) of the ray over all triangles, in exact rational
    arithmetic on the float32 inputs the kernels see: Moller & Trumbore (1997), "Fast, Minimum Storage
    Ray-Triangle Intersection", Journal of Graphics Tools 2(1), by Cramer's rule; closed triangles,
    t > 0, a ray in the triangle's plane (det = 0) misses, as in the kernels."""
    def exact(x):
        return [Fraction(float(np.float32(c))) for c in x]

    def sub(a, b):
        return [x - y for x, y in zip(a, b, strict=True)]

    def dot(a, b):
        return sum(x * y for x, y in zip(a, b, strict=True))

    def cross(a, b):
        return [a[1] * b[2] - a[2] * b[1], a[2] * b[0] - a[0] * b[2], a[0] * b[1] - a[1] * b[0]]

    o, d = exact(origin), exact(direction)
    best = None
    for tri in corners:
        v0, v1, v2 = exact(tri[0]), exact(tri[1]), exact(tri[2])
        e1, e2 = sub(v1, v0), sub(v2, v0)
        p = cross(d, e2)
        det = dot(e1, p)
        if det == 0:
            continue
        s_ = sub(o, v0)
        q = cross(s_, e1)
        u, v, t = dot(s_, p) / det, dot(d, q) / det, dot(e2, q) / det
        if u >= 0 and v >= 0 and u + v <= 1 and t > 0 and (best is None or t < best):
            best = t
    return best


@settings(max_examples=150, deadline=None)
@given(triangles=st.lists(st.lists(COORD, min_size=9, max_size=9), min_size=1, max_size=14),
       rays=st.lists(st.tuples(st.lists(COORD, min_size=3, max_size=3),
                               st.lists(DIRECTION, min_size=3, max_size=3)), min_size=1, max_size=24))
def test_random_soups_agree_with_brute_force(triangles, rays):
    # Reference: brute force. Triangle soups on a coarse grid of shared values (axis-aligned, coplanar
    # and touching triangles, so splits fall in triangle planes) or random, with axis-parallel, grazing
    # and origin-on-plane rays; hit or miss must agree, and t to T_RELATIVE. Where the two differ, exact
    # rational arithmetic decides (brute force rounds in float32 too: a ray passing a vertex at a
    # subnormal distance can come out as a hit), and the kd-tree must agree with it.
    v = np.array(triangles, np.float64).reshape(-1, 3)
    f = np.arange(len(v)).reshape(-1, 3)
    origins = np.array([o for o, _ in rays], np.float64)
    directions = np.array([d for _, d in rays], np.float64)
    keep = np.any(directions != 0.0, axis=1)
    origins, directions = origins[keep], directions[keep]
    if len(origins) == 0:
        return
    reference = tracer.build_accel(v, f, kind="brute").intersect(origins, directions)
    corners = v.astype(np.float32)[f]
    for build in BUILDS:
        kd = tracer.build_accel(v, f, kind="kdtree", build=build, leaf_size=1)
        hits = kd.intersect(origins, directions)
        hit, ref_hit = np.isfinite(hits.t), np.isfinite(reference.t)
        both = hit & ref_hit
        close = np.ones(len(hits.t), bool)
        close[both] = np.abs(hits.t[both] - reference.t[both]) <= T_RELATIVE * reference.t[both]
        for i in np.nonzero((hit != ref_hit) | ~close)[0]:
            t_exact = _exact_closest_t(corners, origins[i], directions[i])
            assert hit[i] == (t_exact is not None), f"{build}: ray {i} kd {hits.t[i]}, exact {t_exact}"
            if hit[i]:
                assert abs(hits.t[i] - float(t_exact)) <= T_RELATIVE * float(t_exact), (build, i)

"""The benchmark's scene and ray generators, and the structure of `tracer bench`'s output.

No timing is asserted (the machine is shared and CI is slow); these check that the generators make
what they claim, deterministically, and that a tiny run of the suite reports every figure it promises.
"""
import json

import numpy as np
import pytest
import trimesh

import tracer.accel
from tracer.bench import results_table, run_bench
from tracer.bench.scenes import (
    SCENES,
    SOUP_LAYERS,
    SURFACE_OFFSET,
    bounce_rays,
    camera_rays,
    displaced_sphere,
    make_scene,
    terrain,
    triangle_soup,
)
from tracer.cli import main
from tracer.errors import UserError

UNIT_TOLERANCE = 1e-5       # float32 unit vectors
COUNT_TOLERANCE = 0.15      # generated triangle counts: "about" the nominal size


@pytest.mark.parametrize("name", list(SCENES))
def test_scene_size_shapes_and_determinism(name):
    first, second = make_scene(name, 2000), make_scene(name, 2000)
    assert first.vertices.shape[1] == 3 and first.faces.shape[1] == 3
    assert first.faces.dtype == np.int64
    assert abs(len(first.faces) - 2000) <= COUNT_TOLERANCE * 2000
    assert first.faces.min() >= 0 and first.faces.max() < len(first.vertices)
    assert np.all(np.isfinite(first.vertices))
    np.testing.assert_array_equal(first.vertices, second.vertices)
    np.testing.assert_array_equal(first.faces, second.faces)


def test_sphere_is_closed_and_faces_outward():
    # Reference library: trimesh merges the shared seam vertices, then checks the closed surface;
    # a positive signed volume means outward-facing counter-clockwise triangles.
    scene = displaced_sphere(3000)
    mesh = trimesh.Trimesh(scene.vertices, scene.faces)
    assert mesh.is_watertight
    assert mesh.is_winding_consistent
    assert mesh.volume > 0.0


def test_terrain_faces_up():
    scene = terrain(2000)
    tri = scene.vertices[scene.faces]
    normal = np.cross(tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 0])
    assert np.all(normal[:, 1] > 0.0)           # counter-clockwise seen from above: front is +y


def test_soup_total_area():
    # trimesh as the reference for the triangle areas; the target is 8 x layers (module docstring).
    scene = triangle_soup(3000)
    mesh = trimesh.Trimesh(scene.vertices, scene.faces, process=False)
    assert mesh.area == pytest.approx(8.0 * SOUP_LAYERS, rel=1e-9)


def test_camera_rays_shapes_and_geometry():
    camera = make_scene("sphere", 100).camera
    origins, directions = camera_rays(camera, 5, 3)
    assert origins.shape == directions.shape == (15, 3)
    assert origins.dtype == directions.dtype == np.float32
    np.testing.assert_allclose(np.linalg.norm(directions, axis=1), 1.0, atol=UNIT_TOLERANCE)
    np.testing.assert_allclose(origins, np.broadcast_to(camera.position, (15, 3)), atol=1e-6)
    # Common practice (pinhole): the centre pixel of an odd-sized image looks straight at look_at.
    forward = camera.look_at - camera.position
    forward /= np.linalg.norm(forward)
    np.testing.assert_allclose(directions[7], forward, atol=UNIT_TOLERANCE)
    # Rows count from the top (INTERFACE.md): the first row looks further up than the last.
    up = np.array([0.0, 1.0, 0.0])
    assert np.all(directions[:5] @ up > directions[10:] @ up)
    again = camera_rays(camera, 5, 3)
    np.testing.assert_array_equal(directions, again[1])


def _rays_onto_floor(n: int, seed: int = 0):
    """Rays from (0, 1, 0) down onto the floor y = 0 (two triangles), with their hits computed by hand."""
    vertices = np.array([[-100.0, 0.0, -100.0], [100.0, 0.0, -100.0], [100.0, 0.0, 100.0],
                         [-100.0, 0.0, 100.0]])
    faces = np.array([[0, 2, 1], [0, 3, 2]])
    rng = np.random.default_rng(seed)
    directions = np.column_stack([rng.uniform(-0.5, 0.5, n), -np.ones(n), rng.uniform(-0.5, 0.5, n)])
    directions /= np.linalg.norm(directions, axis=1, keepdims=True)
    origins = np.tile([0.0, 1.0, 0.0], (n, 1))
    t = 1.0 / -directions[:, 1]
    hit_x, hit_z = directions[:, 0] * t, directions[:, 2] * t
    # Triangle 0 holds x >= z on this floor (corners 0, 2, 1), triangle 1 the rest.
    triangle = np.where(hit_x >= hit_z, 0, 1)
    return vertices, faces, origins, directions, t, triangle


def test_bounce_rays_cosine_hemisphere():
    vertices, faces, origins, directions, t, triangle = _rays_onto_floor(200)
    count = 40_000
    out_o, out_d = bounce_rays(vertices, faces, origins, directions, t, triangle, count, seed=3)
    assert out_o.shape == out_d.shape == (count, 3)
    assert out_o.dtype == out_d.dtype == np.float32
    np.testing.assert_allclose(np.linalg.norm(out_d, axis=1), 1.0, atol=UNIT_TOLERANCE)
    cos_theta = out_d[:, 1].astype(np.float64)      # the floor's normal facing the incoming rays is +y
    assert np.all(cos_theta >= 0.0)
    # Cosine-weighted hemisphere: E[cos theta] = integral of cos^2 / pi over the hemisphere = 2/3,
    # E[cos^2 theta] = 1/2 (closed forms; e.g. Pharr, Jakob & Humphreys, PBR 3rd ed., 13.6.3).
    standard_error = np.sqrt(0.5 - 4.0 / 9.0) / np.sqrt(count)
    assert cos_theta.mean() == pytest.approx(2.0 / 3.0, abs=5 * standard_error)
    assert np.mean(cos_theta ** 2) == pytest.approx(0.5, abs=0.01)
    # Origins lie on the floor's side the rays came from, offset by SURFACE_OFFSET x bounding diagonal.
    diagonal = np.linalg.norm(vertices.max(axis=0) - vertices.min(axis=0))
    np.testing.assert_allclose(out_o[:, 1], SURFACE_OFFSET * diagonal, rtol=1e-3)
    again = bounce_rays(vertices, faces, origins, directions, t, triangle, count, seed=3)
    np.testing.assert_array_equal(out_d, again[1])
    other = bounce_rays(vertices, faces, origins, directions, t, triangle, count, seed=4)
    assert not np.array_equal(out_d, other[1])


def test_bounce_rays_from_below_face_down():
    vertices, faces, origins, directions, t, triangle = _rays_onto_floor(50)
    origins[:, 1] = -1.0
    directions[:, 1] *= -1.0
    out_o, out_d = bounce_rays(vertices, faces, origins, directions, t, triangle, 500)
    assert np.all(out_d[:, 1] <= 0.0) and np.all(out_o[:, 1] < 0.0)


def test_bounce_rays_without_hits_are_empty():
    vertices, faces, origins, directions, t, _ = _rays_onto_floor(10)
    out_o, out_d = bounce_rays(vertices, faces, origins, directions, np.full(10, np.inf),
                               np.full(10, -1), 100)
    assert out_o.shape == out_d.shape == (0, 3)


RESULT_KEYS = {"scene", "size", "triangles", "structure", "available", "build_seconds", "build", "camera",
               "bounce", "bytes_per_triangle", "sah_cost", "speedup_camera", "speedup_bounce", "rays_total"}
RAY_KEYS = {"rays", "seconds", "seconds_median", "mrays_per_s", "mrays_per_s_best", "hit_fraction",
            "nodes_per_ray", "tris_per_ray"}


def test_run_bench_tiny_json(tmp_path, capsys):
    path = tmp_path / "bench.json"
    status = run_bench(quick=True, json_path=str(path), sizes=(300, 1200), scenes=("sphere", "terrain"),
                       resolution=16, repeats=1, progress=False)
    assert status == 0
    data = json.loads(path.read_text())
    assert {"suite", "scenes", "sizes", "structures", "rays", "repeats", "threads", "results",
            "scaling"} <= data.keys()
    assert data["rays"]["camera"] == data["rays"]["bounce"] == 256
    results = data["results"]
    assert len(results) == 2 * 2 * len(data["structures"])
    for row in results:
        if not row["available"]:
            assert row["reason"]
            continue
        assert RESULT_KEYS <= row.keys(), row["structure"]
        for kind in ("camera", "bounce"):
            assert RAY_KEYS <= row[kind].keys()
            assert row[kind]["mrays_per_s"] > 0.0
            assert {"mean", "p50", "p95", "max"} <= row[kind]["nodes_per_ray"].keys()
        assert row["bytes_per_triangle"] > 0.0
        if row["structure"] == "brute":
            # brute tests every triangle for every ray; its speed-up over itself is 1.
            assert row["camera"]["tris_per_ray"]["mean"] == row["triangles"]
            assert row["speedup_camera"] == pytest.approx(1.0)
        else:
            assert row["speedup_camera"] > 0.0
        # Every structure finds the same hits as the first one (rare ties on shared edges aside).
        assert row["camera"].get("agreement_with_reference", 1.0) >= 0.99
    for scene in ("sphere", "terrain"):
        entry = data["scaling"][scene]["bvh"]
        assert entry["sizes"] == ["300", "1200"]
        assert {"camera_nodes_per_ray", "growth", "log2_growth", "nodes_per_doubling"} <= entry.keys()
        assert entry["log2_growth"] == pytest.approx(np.log2(entry["triangles"][1])
                                                     / np.log2(entry["triangles"][0]))
        # With two sizes the one step equals the fitted slope (a line through two points).
        assert entry["nodes_per_doubling_steps"] == pytest.approx([entry["nodes_per_doubling"]])
    out = capsys.readouterr().out
    assert "cam Mr/s" in out and "x brute cam" in out and "scaling" in out and str(path) in out


def test_run_bench_reports_unavailable_structure(tmp_path, capsys, monkeypatch):
    def not_built(vertices, faces, build, leaf_size):
        raise UserError("not built in this test")

    monkeypatch.setitem(tracer.accel.BUILDERS, "kdtree:sah", not_built)
    path = tmp_path / "bench.json"
    assert run_bench(quick=True, json_path=str(path), sizes=(200,), scenes=("soup",), resolution=8,
                     repeats=1, structures=("bvh", "kdtree", "brute"), progress=False) == 0
    rows = {r["structure"]: r for r in json.loads(path.read_text())["results"]}
    assert rows["kdtree"]["available"] is False and "not built" in rows["kdtree"]["reason"]
    assert rows["bvh"]["available"] and rows["brute"]["available"]
    assert "unavailable" in capsys.readouterr().out


def test_brute_over_budget_is_skipped():
    rows = [{"scene": "s", "size": "1M", "structure": "brute", "triangles": 10**6, "available": True,
             "build_seconds": 0.1, "bytes_per_triangle": 40.0, "sah_cost": 1e6, "skipped": "over budget",
             "speedup_camera": None, "speedup_bounce": None, "rays_total": 4}]
    text = results_table(rows)
    assert "skipped" in text and " - " in text


def test_cli_bench_json_folder_missing(tmp_path, capsys):
    assert main(["bench", "--quick", "--json", str(tmp_path / "missing" / "b.json")]) == 2
    err = capsys.readouterr().err
    assert "--json" in err and "Traceback" not in err

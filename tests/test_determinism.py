"""Renders are pure functions of (scene, seed, options), and their cost channels add up.

INTERFACE.md: "The same scene, seed and options give bit-identical EXR channels for any --threads";
random numbers are drawn per (seed, pixel, sample), so structures differ only where they return
different hits; cost.nodes / cost.tris are per-pixel means over samples of the work of all the rays of
a path, primary.* of the camera ray alone; the statistics report nodes_per_ray and tris_per_ray over
all rays traced.
"""
import pickle
import subprocess
import sys
from pathlib import Path

import numba
import numpy as np
import pytest
import trimesh

import tracer

# Sums of per-pixel float32 means against float64 totals: float32 rounding (2^-24 = 6e-8 relative,
# IEEE 754 binary32) accumulated over a few hundred pixels stays far below 1e-6.
SUM_RTOL = 1e-6
SPECS = ("bvh", "bvh:median", "brute")
WIDTH, HEIGHT, SAMPLES = 24, 16, 4


@pytest.fixture(scope="module")
def room(make_scene):
    """A floor, a sphere and a box under a one-sided ceiling light, in a dim environment: occlusion,
    several bounces (Russian roulette from the fourth on), shadow rays and escaping rays all occur."""
    floor = np.array([[-3.0, 0.0, -3.0], [-3.0, 0.0, 3.0], [3.0, 0.0, 3.0], [3.0, 0.0, -3.0]])
    light = np.array([[-0.5, 2.5, -0.5], [0.5, 2.5, -0.5], [0.5, 2.5, 0.5], [-0.5, 2.5, 0.5]])
    quad = np.array([[0, 1, 2], [0, 2, 3]])
    sphere = trimesh.creation.icosphere(subdivisions=2, radius=0.6)
    box = trimesh.creation.box(extents=(0.8, 1.2, 0.8))
    parts = [(floor, quad, "diffuse", (0.7, 0.7, 0.7)),
             (sphere.vertices + (-0.7, 0.6, 0.0), sphere.faces, "diffuse", (0.9, 0.3, 0.2)),
             (box.vertices + (0.8, 0.6, -0.3), box.faces, "diffuse", (0.2, 0.6, 0.9)),
             (light, quad, "emitter", (12.0, 11.0, 9.0))]
    camera = {"position": (0.0, 1.5, 5.0), "look_at": (0.0, 0.7, 0.0), "up": (0.0, 1.0, 0.0), "fov": 45.0}
    return make_scene(parts, camera, environment=(0.05, 0.06, 0.08), width=WIDTH, height=HEIGHT,
                      samples=SAMPLES, bounces=6, seed=3)


def assert_same_render(a, b, channels=None):
    names = channels or sorted(a.channels)
    assert sorted(a.channels) == sorted(b.channels)
    for name in names:
        assert np.array_equal(a.channels[name], b.channels[name]), f"channel {name} differs"
    assert np.array_equal(a.radiance, b.radiance)


@pytest.mark.skipif(numba.config.NUMBA_NUM_THREADS < 2, reason="needs two numba threads")
def test_thread_count_does_not_change_the_render(room):
    one = tracer.render(room, accel="bvh", threads=1)
    two = tracer.render(room, accel="bvh", threads=2)
    assert one.stats["render"]["threads"] == 1 and two.stats["render"]["threads"] == 2
    assert_same_render(one, two)
    for key in ("rays_total", "rays_camera", "rays_shadow"):
        assert one.stats["render"][key] == two.stats["render"][key]
    assert one.stats["cost"] == two.stats["cost"]


def test_seed_decides_the_render(room):
    first = tracer.render(room, accel="bvh", seed=5)
    again = tracer.render(room, accel="bvh", seed=5)
    assert_same_render(first, again)
    assert first.stats["render"]["rays_total"] == again.stats["render"]["rays_total"]
    other = tracer.render(room, accel="bvh", seed=3)
    assert not np.array_equal(first.radiance, other.radiance)


# Run in a fresh interpreter: it renders the pickled scene with each seed in turn and saves the radiance.
SEQUENCE_SCRIPT = """
import pickle, sys
import numpy as np
import tracer
scene = pickle.load(open(sys.argv[1], "rb"))
for seed in (6, 3):
    np.save(f"{sys.argv[2]}-{seed}.npy", tracer.render(scene, accel="bvh", seed=seed).radiance)
"""


def test_a_seed_renders_the_same_after_other_seeds(room, tmp_path):
    """A render is a function of its seed alone: the same in another process, and the same after any
    other seed was rendered first (INTERFACE.md). A fresh interpreter keeps this process clean."""
    expected = tracer.render(room, accel="bvh", seed=3).radiance
    scene_file = tmp_path / "room.pickle"
    scene_file.write_bytes(pickle.dumps(room))
    run = subprocess.run([sys.executable, "-c", SEQUENCE_SCRIPT, str(scene_file), str(tmp_path / "radiance")],
                         capture_output=True, text=True, timeout=600, cwd=Path(tracer.__file__).parents[1])
    assert run.returncode == 0, run.stderr.strip().splitlines()[-1]
    assert np.array_equal(np.load(tmp_path / "radiance-3.npy"), expected)


def test_structures_render_the_same_image(room):
    """Random numbers per (seed, pixel, sample): structures returning the same hits give the same image
    (INTERFACE.md). Only the cost channels may differ."""
    renders = [tracer.render(room, accel=spec) for spec in SPECS]
    same = [name for name in renders[0].channels if not name.startswith(("cost.", "primary."))]
    for other in renders[1:]:
        assert_same_render(renders[0], other, channels=same)
        assert other.stats["render"]["rays_total"] == renders[0].stats["render"]["rays_total"]


@pytest.mark.parametrize("spec", SPECS)
def test_cost_channels_add_up(room, spec):
    result = tracer.render(room, accel=spec)
    channels, render, cost = result.channels, result.stats["render"], result.stats["cost"]
    samples = render["samples"]
    assert samples == SAMPLES
    # Every pixel sample starts with one camera ray (definition of rays_camera).
    assert render["rays_camera"] == WIDTH * HEIGHT * SAMPLES
    assert render["rays_total"] > render["rays_camera"] + render["rays_shadow"] > 0
    # Per-pixel means over samples, summed and times the samples = all work; the per-ray means in the
    # statistics are that work over all rays.
    for channel, key in (("cost.nodes", "nodes_per_ray"), ("cost.tris", "tris_per_ray")):
        total_work = channels[channel].astype(np.float64).sum() * samples
        assert total_work == pytest.approx(cost[key]["mean"] * render["rays_total"], rel=SUM_RTOL)
        assert cost[key]["p50"] <= cost[key]["p95"] <= cost[key]["max"]
    # The camera ray is one of the path's rays.
    assert np.all(channels["primary.nodes"] <= channels["cost.nodes"])
    assert np.all(channels["primary.tris"] <= channels["cost.tris"])
    if spec == "brute":
        # No structure: no nodes, and the camera ray's closest hit tests every triangle (INTERFACE.md).
        assert np.all(channels["primary.tris"] == room.triangles)
        assert np.all(channels["cost.nodes"] == 0.0) and cost["nodes_per_ray"]["max"] == 0.0
        assert result.stats["build"]["nodes"] == 0 and result.stats["build"]["leaves"] == 1

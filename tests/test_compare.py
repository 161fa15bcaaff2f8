"""`tracer compare` and `tracer inspect`: outputs, shared scales, the ratio map, agreeing renders.

Sources: the output names and JSON keys are the project's contract (shared/INTERFACE.md, "tracer compare",
"tracer inspect", "Statistics JSON"); the ratio checks use the definition of the logarithm (log2 1 = 0,
log2 2 = 1); that structures must give the same radiance is INTERFACE.md ("renders of one scene through
different structures differ only where the structures return different hits (ties on shared edges)").
"""
import base64
import contextlib
import io
import json
import re
from pathlib import Path

import numpy as np
import pytest

from tracer.cli import build_parser, main
from tracer.diagnostics import compare
from tracer.diagnostics.heatmap import value_range
from tracer.errors import UserError

SPECS = ["bvh", "bvh:median", "brute"]
# Share of pixels allowed to differ between structures: ties on shared edges only (the brief's bound).
MAX_DIFFERING_FRACTION = 0.01
# Largest radiance difference allowed where pixels agree: float32 round-off of identical hits.
AGREEING_PIXEL_TOLERANCE = 1e-5

# A scenario of our own making: floor, back wall, a ceiling lamp and a turned box.
TINY_SCENE = """
[render]
width = 24
height = 16
samples = 2
bounces = 3
seed = 11

[camera]
position = [0.0, 1.0, 4.0]
look_at = [0.0, 0.8, 0.0]
fov = 50.0

[materials.wall]
type = "diffuse"
albedo = [0.7, 0.7, 0.7]

[materials.red]
type = "diffuse"
albedo = [0.7, 0.2, 0.2]

[materials.lamp]
type = "emitter"
radiance = [8.0, 8.0, 8.0]

[[objects]]
shape = "rect"
center = [0.0, 0.0, 0.0]
size = [4.0, 4.0]
normal = [0.0, 1.0, 0.0]
material = "wall"

[[objects]]
shape = "rect"
center = [0.0, 1.5, -1.5]
size = [4.0, 3.0]
normal = [0.0, 0.0, 1.0]
material = "red"

[[objects]]
shape = "rect"
center = [0.0, 2.5, 0.0]
size = [1.0, 1.0]
normal = [0.0, -1.0, 0.0]
material = "lamp"

[[objects]]
shape = "box"
center = [0.3, 0.4, 0.0]
size = [0.8, 0.8, 0.8]
rotate = [0.0, 25.0, 0.0]
material = "wall"
"""


def _write_scene(folder: Path) -> Path:
    path = folder / "tiny.toml"
    path.write_text(TINY_SCENE)
    return path


def _run(argv: list[str]) -> tuple[int, str, str]:
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        status = main(argv)
    return status, out.getvalue(), err.getvalue()


@pytest.fixture(scope="module")
def compared(tmp_path_factory):
    """One `tracer compare` of the tiny scene through bvh, bvh:median and brute (via the CLI)."""
    folder = tmp_path_factory.mktemp("compare")
    scene = _write_scene(folder)
    out = folder / "out"
    status, stdout, stderr = _run(["compare", str(scene), "--accel", *SPECS, "--out", str(out), "--quiet"])
    return {"status": status, "stdout": stdout, "stderr": stderr, "out": out}


def test_compare_writes_every_output(compared):
    # INTERFACE.md, `tracer compare`: each SPEC's render outputs plus the NAME-compare-* files.
    assert compared["status"] == 0, compared["stderr"]
    out = compared["out"]
    for tag in ("bvh", "bvh-median", "brute"):
        for suffix in (".exr", ".png", "-nodes.png", "-tris.png", ".json"):
            assert (out / f"tiny-{tag}{suffix}").is_file(), f"tiny-{tag}{suffix}"
    for name in ("tiny-compare.json", "tiny-compare-nodes.png", "tiny-compare-tris.png",
                 "tiny-compare-ratio.png", "tiny-compare.html"):
        assert (out / name).is_file(), name
        assert str(out / name) in compared["stdout"]


def test_compare_json_has_the_contract_keys(compared):
    # INTERFACE.md: {"scene": str, "specs": [SPEC, ...], "results": {SPEC: statistics}}.
    document = json.loads((compared["out"] / "tiny-compare.json").read_text())
    assert isinstance(document["scene"], str)
    assert document["specs"] == SPECS
    assert set(document["results"]) == set(SPECS)
    for spec, stats in document["results"].items():
        assert stats["accel"] == spec
        for key in ("seconds", "nodes", "leaves", "depth_max", "sah_cost", "references_per_triangle"):
            assert key in stats["build"]
        for key in ("seconds", "width", "height", "samples", "threads", "rays_total", "rays_camera",
                    "rays_shadow", "mrays_per_s"):
            assert key in stats["render"]
        for cost in ("nodes_per_ray", "tris_per_ray"):
            assert set(stats["cost"][cost]) >= {"mean", "p50", "p95", "max"}
    # Same seed and samples for every SPEC (INTERFACE.md, "same seed, same samples").
    assert len({(s["render"]["seed"], s["render"]["samples"]) for s in document["results"].values()}) == 1
    # INTERFACE.md: "brute reports nodes 0 and one leaf".
    assert document["results"]["brute"]["build"]["nodes"] == 0
    assert document["results"]["brute"]["build"]["leaves"] == 1


def test_compare_prints_the_statistics_table(compared):
    # The brief: one row per SPEC with the named columns, on stdout.
    stdout = compared["stdout"]
    header = stdout.splitlines()[0]
    for column in ("build s", "nodes", "leaves", "depth max", "SAH cost", "refs/tri", "overlap", "Mrays/s",
                   "nodes/ray mean", "tris/ray mean", "p95"):
        assert column in header
    rows = [line.split()[0] for line in stdout.splitlines()[2:2 + len(SPECS)]]
    assert rows == SPECS


def test_radiance_agrees_between_structures(compared):
    # INTERFACE.md: the same rays with the same random numbers; only ties on shared edges may differ.
    from tracer.io import read_exr

    def radiance(tag):
        channels, _ = read_exr(compared["out"] / f"tiny-{tag}.exr")
        return np.stack([np.asarray(channels[c], np.float64) for c in "RGB"], axis=-1)

    reference = radiance("bvh")
    assert np.all(np.isfinite(reference)) and reference.max() > 0
    for tag in ("bvh-median", "brute"):
        other = radiance(tag)
        difference = np.abs(other - reference).max(axis=-1)
        differing = difference > AGREEING_PIXEL_TOLERANCE * np.maximum(1.0, np.abs(reference).max(axis=-1))
        assert differing.mean() < MAX_DIFFERING_FRACTION, tag
        assert difference[~differing].max() <= AGREEING_PIXEL_TOLERANCE, tag
        agreement = compare.radiance_agreement(reference, other)
        assert agreement["differing_pixel_fraction"] == pytest.approx(differing.mean())


def test_report_is_self_contained(compared):
    # The brief: images embedded as base64 data URIs (RFC 2397) so the report opens from disk alone.
    text = (compared["out"] / "tiny-compare.html").read_text()
    assert not re.search(r'<img[^>]+src="(?!data:)', text)
    images = re.findall(r'src="data:image/png;base64,([A-Za-z0-9+/=]+)"', text)
    # plot + 3 display renders + nodes, tris, primary nodes, primary tris + ratio
    assert len(images) == 1 + len(SPECS) + 4 + 1
    for payload in images:
        assert base64.b64decode(payload).startswith(b"\x89PNG\r\n\x1a\n")  # PNG signature, ISO/IEC 15948
    for spec in SPECS:
        assert spec in text
    assert "Why" in text and "Mrays/s" in text


def test_heatmap_panels_share_one_scale(monkeypatch, tmp_path):
    # INTERFACE.md: the heat maps side by side on ONE shared colour scale: the panel writer must get the
    # minimum and maximum over all panels (value_range also includes 0, the natural origin of a count).
    calls = []

    def record(path, panels, label, low=None, high=None, log=False, diverging=False):
        calls.append((low, high, log))
        return path

    monkeypatch.setattr(compare, "write_heatmaps", record)
    first = np.array([[1.0, 2.0], [3.0, 4.0]])
    second = np.array([[5.0, 6.0], [7.0, 40.0]])
    compare.write_shared_heatmaps(tmp_path / "x.png", [("a", first), ("b", second)], "label")
    compare.write_shared_heatmaps(tmp_path / "y.png", [("a", first), ("b", second)], "label", log=True)
    assert calls[0] == (0.0, 40.0, False)
    assert calls[1] == (1.0, 40.0, True)
    assert value_range([first, second]) == (0.0, 40.0)


def test_compare_heatmaps_use_the_global_range(monkeypatch, tmp_path):
    # INTERFACE.md, one shared scale: in a real compare every panel set gets the range over all SPECs.
    calls = []
    real = compare.write_heatmaps

    def record(path, panels, label, low=None, high=None, log=False, diverging=False):
        calls.append((Path(path).name, [np.array(image) for _, image in panels], low, high, diverging))
        return real(path, panels, label, low, high, log, diverging)

    monkeypatch.setattr(compare, "write_heatmaps", record)
    scene = _write_scene(tmp_path)
    status, _, err = _run(["compare", str(scene), "--accel", "bvh", "bvh:median",
                           "--out", str(tmp_path / "o"), "--quiet", "--samples", "1"])
    assert status == 0, err
    shared = [c for c in calls if not c[4]]
    assert {c[0] for c in shared} >= {"tiny-compare-nodes.png", "tiny-compare-tris.png"}
    for _, images, low, high, _ in shared:
        assert len(images) == 2
        assert low == min(0.0, min(im.min() for im in images))
        assert high == max(im.max() for im in images)
    ratio = [c for c in calls if c[4]]
    assert len(ratio) == 1 and ratio[0][0] == "tiny-compare-ratio.png"


def test_ratio_is_zero_for_equal_costs():
    # log2(x / x) = 0, also where both are 0 (the ratio map is centred on "equal").
    rng = np.random.default_rng(3)
    cost = rng.uniform(0.0, 50.0, size=(5, 7))
    cost[0, :3] = 0.0
    np.testing.assert_array_equal(compare.log2_cost_ratio(cost, cost), np.zeros((5, 7)))


def test_ratio_is_one_for_twice_the_cost():
    # log2(2) = 1 (definition of the logarithm); costs at or above the floor are taken as they are.
    rng = np.random.default_rng(4)
    b = rng.uniform(compare.RATIO_FLOOR, 50.0, size=(4, 6))
    np.testing.assert_allclose(compare.log2_cost_ratio(2.0 * b, b), np.ones((4, 6)), rtol=0, atol=1e-12)
    np.testing.assert_allclose(compare.log2_cost_ratio(b, 2.0 * b), -np.ones((4, 6)), rtol=0, atol=1e-12)


def test_ratio_floors_a_zero_cost():
    # A zero cost counts as the floor (brute force visits no node), so the ratio stays finite.
    a = np.array([[0.0, 4.0]])
    b = np.array([[2.0, 0.0]])
    ratio = compare.log2_cost_ratio(a, b)
    floor = compare.RATIO_FLOOR
    np.testing.assert_allclose(ratio, [[np.log2(floor / 2.0), np.log2(4.0 / floor)]])
    with pytest.raises(ValueError):
        compare.log2_cost_ratio(np.zeros((2, 2)), np.zeros((2, 3)))


def test_spec_checks():
    # INTERFACE.md: compare takes SPEC SPEC [SPEC...]; a SPEC given twice (also as "bvh:sah") is an error.
    assert compare.canonical_specs(["bvh:sah", "brute"], at_least=2) == ["bvh", "brute"]
    with pytest.raises(UserError, match="listed twice"):
        compare.canonical_specs(["bvh", "bvh:sah"], at_least=2)
    with pytest.raises(UserError, match="at least 2"):
        compare.canonical_specs(["bvh"], at_least=2)
    with pytest.raises(UserError, match="unknown structure"):
        compare.canonical_specs(["bvh", "octree"], at_least=2)


@pytest.mark.parametrize("specs", [["bvh"], ["bvh", "no-such-tree"], ["bvh", "bvh:sah"]])
def test_compare_bad_specs_exit_2_with_one_line(tmp_path, specs):
    # INTERFACE.md: bad input exits 2 with one line on stderr, before anything is rendered.
    scene = _write_scene(tmp_path)
    status, stdout, stderr = _run(["compare", str(scene), "--accel", *specs, "--out", str(tmp_path / "o")])
    assert status == 2
    assert len(stderr.strip().splitlines()) == 1, stderr
    assert "--accel" in stderr
    assert stdout == ""
    assert not (tmp_path / "o").exists()


def test_time_limit_gives_every_spec_the_same_samples(tmp_path):
    # INTERFACE.md: compare renders with the same samples for every SPEC, also under --time-limit.
    scene = _write_scene(tmp_path)
    out = tmp_path / "o"
    status, _, err = _run(["compare", str(scene), "--accel", "bvh", "brute", "--out", str(out), "--quiet",
                           "--samples", "64", "--time-limit", "0.000001"])
    assert status == 0, err
    results = json.loads((out / "tiny-compare.json").read_text())["results"]
    samples = {spec: stats["render"]["samples"] for spec, stats in results.items()}
    assert samples["bvh"] < 64
    assert samples["brute"] == samples["bvh"]


def test_interrupted_compare_writes_what_is_done(tmp_path):
    # INTERFACE.md: Ctrl-C during compare writes what is finished and exits with status 130.
    from tracer.cli import _render_one

    class Flag:
        raised = False

        def __enter__(self):
            return self

        def __exit__(self, *exc):
            return False

        def __call__(self):
            return Flag.raised

    def render_then_interrupt(scene, spec, args, stop):
        result = _render_one(scene, spec, args, stop)
        Flag.raised = True          # as if Ctrl-C came at the end of the first structure
        return result

    scene = _write_scene(tmp_path)
    args = build_parser().parse_args(["compare", str(scene), "--accel", "bvh", "brute", "--out",
                                      str(tmp_path / "o"), "--samples", "1", "--quiet"])
    with contextlib.redirect_stdout(io.StringIO()), contextlib.redirect_stderr(io.StringIO()):
        status = compare.run_compare(args, render_then_interrupt, Flag)
    assert status == 130
    document = json.loads((tmp_path / "o" / "tiny-compare.json").read_text())
    assert document["specs"] == ["bvh"] and list(document["results"]) == ["bvh"]
    assert document["interrupted"] is True
    assert (tmp_path / "o" / "tiny-compare.html").is_file()


def test_inspect_prints_a_table_and_writes_json(tmp_path):
    # INTERFACE.md, `tracer inspect`: build time, nodes, leaves, depth, leaf-size histogram, SAH cost,
    # BVH sibling overlap; --json FILE with {"scene", "specs", "results": {SPEC: build statistics}}.
    scene = _write_scene(tmp_path)
    json_path = tmp_path / "stats" / "inspect.json"
    status, stdout, stderr = _run(["inspect", str(scene), "--accel", "bvh", "bvh:median", "brute",
                                   "--json", str(json_path)])
    assert status == 0, stderr
    for text in ("build s", "nodes", "leaves", "depth max", "SAH cost", "overlap", "refs/tri",
                 "leaves by the number of triangles"):
        assert text in stdout
    assert "building" in stderr and "building" not in stdout     # notes on stderr only
    document = json.loads(json_path.read_text())
    assert set(document) >= {"scene", "specs", "results"}
    assert document["specs"] == ["bvh", "bvh:median", "brute"]
    for stats in document["results"].values():
        for key in ("seconds", "nodes", "leaves", "depth_max", "sah_cost", "references_per_triangle",
                    "leaf_size_histogram"):
            assert key in stats
        # Every triangle sits in some leaf: the histogram counts all leaves (definition of a histogram).
        assert sum(stats["leaf_size_histogram"].values()) == stats["leaves"]
    assert "sibling_overlap" in document["results"]["bvh"]
    assert document["results"]["brute"]["nodes"] == 0


def test_inspect_unknown_spec_exits_2(tmp_path):
    # INTERFACE.md: bad input exits 2 with one line on stderr.
    scene = _write_scene(tmp_path)
    status, stdout, stderr = _run(["inspect", str(scene), "--accel", "bvh", "quadtree"])
    assert status == 2
    assert len(stderr.strip().splitlines()) == 1 and "quadtree" in stderr


def test_table_formatter_aligns_columns():
    # Shared by compare and inspect: one header, one rule, one row per SPEC, columns aligned.
    headers, rows = compare.stats_table({"bvh": {"build": {"seconds": 0.5, "nodes": 1234}},
                                         "brute": {"build": {"nodes": 0}}})
    assert headers[0] == "SPEC" and rows[0][0] == "bvh" and rows[1][0] == "brute"
    assert rows[0][headers.index("nodes")] == "1,234"
    assert rows[1][headers.index("build s")] == "-"            # missing values shown as "-"
    lines = compare.format_table(headers, rows).splitlines()
    assert len(lines) == 4
    assert len({len(line) for line in lines[:2]}) == 1


def test_report_explanation_follows_the_statistics(compared):
    # The "why" paragraph must name the structure the statistics single out (read back from the JSON).
    from tracer.diagnostics.report import explain
    document = json.loads((compared["out"] / "tiny-compare.json").read_text())
    results = document["results"]
    text = " ".join(explain(results, document["ratio"]))
    fastest = max(results, key=lambda s: results[s]["render"]["mrays_per_s"])
    assert text.startswith(f"{fastest} traced fastest")
    with_nodes = [s for s in results if results[s]["build"]["nodes"] > 0]
    fewest_nodes = min(with_nodes, key=lambda s: results[s]["cost"]["nodes_per_ray"]["mean"])
    assert f"{fewest_nodes} visited the fewest nodes per ray" in text
    fewest_tris = min(results, key=lambda s: results[s]["cost"]["tris_per_ray"]["mean"])
    assert f"{fewest_tris} tested the fewest triangles per ray" in text
    assert "overlap" in text        # bvh and bvh:median report sibling overlap

"""Procedural shapes (tracer/scene/procedural.py): `terrain` heightfields and `scatter` clusters.

Geometry is checked against trimesh (bounds, areas, volumes, normals, winding, Euler characteristic) and
closed forms; the noise against the properties Perlin states for gradient noise (1985: zero at lattice
points, slope of the corner gradient there; 2002: the fade curve's vanishing derivatives); random
rotations against Archimedes' hat-box theorem (a uniform direction has a uniform z in [-1, 1]) with
scipy's Kolmogorov-Smirnov test. The error corpus is tests/scenes/bad-terrain-*.toml and
bad-scatter-*.toml, each file stating on its first line the message fragment it must produce.
"""
import math
import time
from pathlib import Path

import numpy as np
import pytest
import trimesh
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy import stats

from tracer.errors import UserError
from tracer.scene import Scene, load_scene, procedural, scene_from_document

SCENES = Path(__file__).parent / "scenes"
DEMO_SCENES = Path(__file__).parent.parent / "scenes"
BAD_PROCEDURAL = sorted(SCENES.glob("bad-terrain-*.toml")) + sorted(SCENES.glob("bad-scatter-*.toml"))
# Tolerances, one per kind of check.
EXACT_GEOMETRY = 1e-12      # positions built by exact formulas in float64
VOLUME_RELATIVE = 1e-9      # volumes summed over many triangles
SLOPE_ABSOLUTE = 1e-4       # central differences of step 1e-6 on a quintic
KS_P_VALUE = 1e-3           # reject uniformity only on overwhelming evidence (fixed seeds: deterministic)

CAMERA = '[camera]\nposition = [0.0, 5.0, 20.0]\nlook_at = [0.0, 0.0, 0.0]\n'
GREY = '[materials.grey]\ntype = "diffuse"\n'


def one_object(tmp_path: Path, lines: str) -> Scene:
    """A scene of one camera, one grey material and the single object `lines`."""
    path = tmp_path / "scene.toml"
    path.write_text(CAMERA + GREY + '[[objects]]\nmaterial = "grey"\n' + lines)
    return load_scene(path)


def as_trimesh(scene: Scene) -> trimesh.Trimesh:
    return trimesh.Trimesh(scene.vertices, scene.faces, process=False)


# --- terrain ---------------------------------------------------------------------------------------

@pytest.mark.parametrize("resolution, cells", [("1", (1, 1)), ("7", (7, 7)), ("[12, 5]", (12, 5))])
def test_terrain_has_two_triangles_per_cell(tmp_path, resolution, cells):
    # A grid of nx x nz quads has (nx+1)(nz+1) vertices and 2 nx nz triangles (common practice).
    scene = one_object(tmp_path, f'shape = "terrain"\nresolution = {resolution}\n')
    assert scene.triangles == 2 * cells[0] * cells[1]
    assert scene.vertices.shape[0] == (cells[0] + 1) * (cells[1] + 1)


def test_terrain_defaults(tmp_path):
    scene = one_object(tmp_path, 'shape = "terrain"\n')
    assert scene.triangles == 2 * 64 * 64  # resolution 64
    bounds = as_trimesh(scene).bounds
    np.testing.assert_array_equal(bounds[:, [0, 2]], [[-5.0, -5.0], [5.0, 5.0]])  # size [10, 10]
    assert -1.0 <= bounds[0, 1] and bounds[1, 1] <= 1.0  # height 1
    explicit = one_object(tmp_path, 'shape = "terrain"\nsize = [10.0, 10.0]\nresolution = 64\nheight = 1.0\n'
                                    'feature_size = 2.5\noctaves = 6\nroughness = 0.5\nseed = 0\n')
    np.testing.assert_array_equal(scene.vertices, explicit.vertices)


def test_terrain_spans_its_size_about_its_center(tmp_path):
    scene = one_object(tmp_path, 'shape = "terrain"\ncenter = [3.0, -2.0, 1.0]\nsize = [8.0, 5.0]\n'
                                 'resolution = [16, 10]\nheight = 0.5\n')
    bounds = as_trimesh(scene).bounds  # trimesh's axis-aligned bounds
    np.testing.assert_allclose(bounds[:, 0], [3.0 - 4.0, 3.0 + 4.0], atol=EXACT_GEOMETRY)
    np.testing.assert_allclose(bounds[:, 2], [1.0 - 2.5, 1.0 + 2.5], atol=EXACT_GEOMETRY)
    assert -2.5 <= bounds[0, 1] and bounds[1, 1] <= -1.5


def test_flat_terrain_area_is_width_times_depth(tmp_path):
    # Closed form: a plane rectangle's area; trimesh sums the triangle areas.
    scene = one_object(tmp_path, 'shape = "terrain"\nsize = [6.0, 2.5]\nresolution = [9, 4]\nheight = 0.0\n')
    assert as_trimesh(scene).area == pytest.approx(15.0, rel=VOLUME_RELATIVE)
    np.testing.assert_array_equal(scene.vertices[:, 1], 0.0)


def test_terrain_faces_up_and_is_a_consistently_wound_disc(tmp_path):
    scene = one_object(tmp_path, 'shape = "terrain"\nresolution = [30, 20]\nheight = 3.0\nseed = 5\n')
    mesh = as_trimesh(scene)
    # Counter-clockwise seen from above: trimesh's right-hand-rule normals point to +Y.
    assert (mesh.face_normals[:, 1] > 0.0).all()
    assert mesh.is_winding_consistent
    # A triangulated disc has Euler characteristic V - E + F = 1 (common practice), and its
    # boundary runs once around the grid: 2 (nx + nz) edges used by one face only.
    assert mesh.euler_number == 1
    assert trimesh.grouping.group_rows(mesh.edges_sorted, require_count=1).size == 2 * (30 + 20)


@pytest.mark.parametrize("seed", [0, 1, 99, 2**63 - 1])
def test_terrain_stays_within_its_height(tmp_path, seed):
    # 2-D gradient noise with unit gradients lies within ±√2/2 (from memory, Perlin noise range
    # ±√N/2); the fBm is divided by its largest possible value, so |y| <= height.
    scene = one_object(tmp_path, f'shape = "terrain"\nresolution = 200\nheight = 2.0\nseed = {seed}\n'
                                 'octaves = 8\nroughness = 1.0\n')
    heights = scene.vertices[:, 1]
    assert np.abs(heights).max() <= 2.0
    assert heights.std() > 0.05  # and it is not flat


def test_finer_terrain_contains_the_coarser_one(tmp_path):
    # One seed is one landscape: the grid of 2n cells holds the exact vertices of the grid of n.
    coarse = one_object(tmp_path, 'shape = "terrain"\nresolution = [20, 12]\nseed = 4\n')
    fine = one_object(tmp_path, 'shape = "terrain"\nresolution = [40, 24]\nseed = 4\n')
    fine_grid = fine.vertices.reshape(25, 41, 3)
    np.testing.assert_array_equal(fine_grid[::2, ::2].reshape(-1, 3), coarse.vertices)


def test_terrain_seed_changes_the_landscape_and_nothing_else_does(tmp_path):
    lines = 'shape = "terrain"\nresolution = 16\n'
    first = one_object(tmp_path, lines + "seed = 8\n")
    again = one_object(tmp_path, lines + "seed = 8\n")
    other = one_object(tmp_path, lines + "seed = 9\n")
    moved = one_object(tmp_path, lines + "seed = 8\ncenter = [1.0, 2.0, 3.0]\n")
    np.testing.assert_array_equal(first.vertices, again.vertices)
    assert not np.array_equal(first.vertices[:, 1], other.vertices[:, 1])
    np.testing.assert_allclose(moved.vertices - first.vertices, np.broadcast_to([1.0, 2.0, 3.0], (289, 3)),
                               atol=EXACT_GEOMETRY)


def test_rougher_terrain_has_more_fine_detail(tmp_path):
    # Musgrave (2003): the amplitude ratio of successive octaves sets the roughness; a larger ratio
    # puts more energy into the high frequencies, measured by the mean squared second difference.
    def detail(roughness: float) -> float:
        scene = one_object(tmp_path, f'shape = "terrain"\nresolution = 128\nroughness = {roughness}\n')
        heights = scene.vertices[:, 1].reshape(129, 129)
        return float(np.mean(np.diff(heights, n=2, axis=1) ** 2) / np.var(heights))
    assert detail(0.3) < detail(0.6) < detail(0.9)


def test_terrain_accepts_the_common_transform(tmp_path):
    scene = one_object(tmp_path, 'shape = "terrain"\nsize = [4.0, 2.0]\nresolution = 4\nheight = 0.0\n'
                                 'rotate = [0.0, 90.0, 0.0]\nscale = 2.0\ntranslate = [0.0, 1.0, 0.0]\n')
    # Scaled by 2, then turned 90 degrees about +Y: the 8 x 4 sheet now spans 4 along x and 8 along z.
    np.testing.assert_allclose(as_trimesh(scene).bounds, [[-2.0, 1.0, -4.0], [2.0, 1.0, 4.0]],
                               atol=EXACT_GEOMETRY)


# --- gradient noise and fade ---------------------------------------------------------------------

def test_fade_is_perlins_quintic_with_flat_ends():
    # Perlin (2002): 6t^5 - 15t^4 + 10t^3; value 0 and 1 at the ends, first and second derivatives 0.
    t = np.linspace(0.0, 1.0, 101)
    np.testing.assert_allclose(procedural.fade(t), 6 * t**5 - 15 * t**4 + 10 * t**3, atol=EXACT_GEOMETRY)
    curve = np.polynomial.Polynomial([0, 0, 0, 10, -15, 6])
    for end in (0.0, 1.0):
        assert curve.deriv(1)(end) == 0.0 and curve.deriv(2)(end) == 0.0
    assert procedural.fade(np.array(0.0)) == 0.0 and procedural.fade(np.array(1.0)) == 1.0


LATTICE = np.arange(-5.0, 6.0)


@pytest.mark.parametrize("key", [np.uint64(1), np.uint64(0xDEADBEEF)])
def test_gradient_noise_vanishes_at_lattice_points_with_unit_slope(key):
    # Perlin (1985): the noise is 0 at every integer point and there follows the corner's ramp
    # g · (p - corner), so its slope is the unit gradient g.
    x, z = LATTICE[None, :], LATTICE[:, None]
    np.testing.assert_array_equal(procedural.gradient_noise(x, z, key), 0.0)
    step, noise = 1e-6, procedural.gradient_noise
    slope_x = (noise(x + step, z, key) - noise(x - step, z, key)) / (2 * step)
    slope_z = (noise(x, z + step, key) - noise(x, z - step, key)) / (2 * step)
    np.testing.assert_allclose(np.hypot(slope_x, slope_z), 1.0, atol=SLOPE_ABSOLUTE)


@settings(max_examples=200, deadline=None)
@given(x=st.floats(-1e5, 1e5), z=st.floats(-1e5, 1e5), key=st.integers(0, 2**64 - 1))
def test_gradient_noise_is_bounded(x, z, key):
    # From memory: N-dimensional gradient noise with unit gradients lies within ±√N/2.
    value = procedural.gradient_noise(np.array([x]), np.array([z]), np.uint64(key))
    assert abs(float(value[0])) <= math.sqrt(2.0) / 2.0


def test_gradient_noise_is_smooth_across_cell_borders():
    # Perlin (2002): with the quintic fade the noise has continuous second derivatives, also across
    # lattice lines; compare one-sided second differences at the border x = 3.
    key, step = np.uint64(77), 1e-4
    z = np.linspace(-2.0, 2.0, 41)[:, None]
    def second(at):
        return (procedural.gradient_noise(np.array([[at + step]]), z, key)
                - 2 * procedural.gradient_noise(np.array([[at]]), z, key)
                + procedural.gradient_noise(np.array([[at - step]]), z, key)) / step**2
    left, right = second(3.0 - 2 * step), second(3.0 + 2 * step)
    np.testing.assert_allclose(left, right, atol=0.05)


# --- scatter ---------------------------------------------------------------------------------------

@pytest.mark.parametrize("piece, per_piece", [("sphere", 80), ("tetrahedron", 4), ("box", 12)])
def test_scatter_triangle_counts(tmp_path, piece, per_piece):
    # Icosphere of one split: 20 · 4 = 80 faces; regular tetrahedron 4; cube 12 (common practice).
    scene = one_object(tmp_path, f'shape = "scatter"\npiece = "{piece}"\ncount = 37\n')
    assert scene.triangles == 37 * per_piece


@pytest.mark.parametrize("subdivisions", [0, 2])
def test_scatter_sphere_subdivisions(tmp_path, subdivisions):
    scene = one_object(tmp_path, f'shape = "scatter"\ncount = 3\nsubdivisions = {subdivisions}\n')
    assert scene.triangles == 3 * 20 * 4**subdivisions


# Closed-form volumes of solids inscribed in a sphere of radius R (common practice):
# regular tetrahedron 8√3 R³/27 (edge R·√(8/3)); cube 8√3 R³/9 (side 2R/√3).
UNIT_VOLUME = {"tetrahedron": 8.0 * math.sqrt(3.0) / 27.0, "box": 8.0 * math.sqrt(3.0) / 9.0}


@pytest.mark.parametrize("piece", ["tetrahedron", "box"])
def test_scatter_pieces_are_closed_outward_and_of_the_right_volume(tmp_path, piece):
    scene = one_object(tmp_path, f'shape = "scatter"\npiece = "{piece}"\ncount = 50\nradius = 0.2\n'
                                 'stretch = [0.5, 3.0, 1.5]\nsize = [4.0, 4.0, 4.0]\nseed = 3\n')
    mesh = as_trimesh(scene)
    assert mesh.is_watertight and mesh.is_winding_consistent
    # Overlapping pieces still add up: trimesh's signed volume is a sum over the faces.
    expected = 50 * UNIT_VOLUME[piece] * 0.2**3 * (0.5 * 3.0 * 1.5)
    assert mesh.volume == pytest.approx(expected, rel=VOLUME_RELATIVE)
    for part in mesh.split(only_watertight=False):
        assert part.volume > 0.0  # every piece faces outward


def test_scatter_centres_are_uniform_in_the_box(tmp_path):
    scene = one_object(tmp_path, 'shape = "scatter"\npiece = "box"\ncount = 4000\nradius = 0.01\n'
                                 'center = [1.0, 2.0, -3.0]\nsize = [4.0, 0.0, 2.0]\n')
    # A cube's 8 corners average to its centre.
    centres = scene.vertices.reshape(4000, 8, 3).mean(axis=1)
    np.testing.assert_allclose(centres[:, 1], 2.0, atol=EXACT_GEOMETRY)  # size 0 along y: one layer
    for axis, low, width in ((0, -1.0, 4.0), (2, -4.0, 2.0)):
        assert low <= centres[:, axis].min() and centres[:, axis].max() <= low + width
        assert stats.kstest(centres[:, axis], "uniform", args=(low, width)).pvalue > KS_P_VALUE


def test_random_rotations_are_uniform():
    matrices = procedural.random_rotations(seed=12, count=20000, rotation="random")
    # Proper rotations: orthonormal, determinant +1.
    identities = np.broadcast_to(np.eye(3), matrices.shape)
    np.testing.assert_allclose(matrices @ matrices.transpose(0, 2, 1), identities, atol=EXACT_GEOMETRY)
    np.testing.assert_allclose(np.linalg.det(matrices), 1.0, atol=EXACT_GEOMETRY)
    # Archimedes' hat-box theorem: a uniform direction on the sphere has z uniform in [-1, 1] and an
    # independent uniform azimuth; check where each rotation sends each axis.
    for axis in range(3):
        turned = matrices[:, :, axis]
        assert stats.kstest(turned[:, 2], "uniform", args=(-1.0, 2.0)).pvalue > KS_P_VALUE
        azimuth = np.arctan2(turned[:, 1], turned[:, 0])
        assert stats.kstest(azimuth, "uniform", args=(-math.pi, 2 * math.pi)).pvalue > KS_P_VALUE


def test_rotation_about_y_keeps_pieces_upright(tmp_path):
    scene = one_object(tmp_path, 'shape = "scatter"\npiece = "box"\ncount = 40\nrotation = "about_y"\n'
                                 'stretch = [0.1, 4.0, 0.1]\nradius = 0.5\n')
    normals = as_trimesh(scene).face_normals.reshape(40, 12, 3)
    # Per piece: 2 triangles face straight up, 2 straight down, the other 8 are horizontal.
    vertical = np.abs(normals[:, :, 1])
    assert ((vertical > 1.0 - EXACT_GEOMETRY).sum(axis=1) == 4).all()
    assert ((vertical < EXACT_GEOMETRY).sum(axis=1) == 8).all()
    # Not all turned the same way.
    assert np.unique(np.round(normals[:, :, 0], 6), axis=0).shape[0] > 1


def test_no_rotation_keeps_pieces_axis_aligned(tmp_path):
    scene = one_object(tmp_path, 'shape = "scatter"\npiece = "box"\ncount = 10\nrotation = "none"\n'
                                 'stretch = [1.0, 2.0, 3.0]\nradius = 0.5\n')
    extents = np.ptp(scene.vertices.reshape(10, 8, 3), axis=1)
    side = 2.0 * 0.5 / math.sqrt(3.0)
    np.testing.assert_allclose(extents, np.broadcast_to([side, 2 * side, 3 * side], (10, 3)),
                               atol=EXACT_GEOMETRY)


def test_scatter_radius_variation(tmp_path):
    scene = one_object(tmp_path, 'shape = "scatter"\npiece = "tetrahedron"\ncount = 500\nradius = 2.0\n'
                                 'variation = 0.75\n')
    corners = scene.vertices.reshape(500, 4, 3)
    radii = np.linalg.norm(corners - corners.mean(axis=1, keepdims=True), axis=2)
    np.testing.assert_allclose(radii, radii[:, :1].repeat(4, axis=1), rtol=1e-12)
    assert 0.5 - EXACT_GEOMETRY <= radii.min() and radii.max() <= 2.0 + EXACT_GEOMETRY
    # Uniform in [r (1 - variation), r] (the documented law).
    assert stats.kstest(radii[:, 0], "uniform", args=(0.5, 1.5)).pvalue > KS_P_VALUE


def test_scatter_defaults_and_determinism(tmp_path):
    scene = one_object(tmp_path, 'shape = "scatter"\n')
    explicit = one_object(tmp_path, 'shape = "scatter"\ncenter = [0.0, 0.0, 0.0]\nsize = [1.0, 1.0, 1.0]\n'
                                    'count = 100\npiece = "sphere"\nsubdivisions = 1\nradius = 0.05\n'
                                    'stretch = [1.0, 1.0, 1.0]\nrotation = "random"\nvariation = 0.0\n'
                                    'seed = 0\n')
    np.testing.assert_array_equal(scene.vertices, explicit.vertices)
    assert scene.triangles == 100 * 80
    other = one_object(tmp_path, 'shape = "scatter"\nseed = 1\n')
    assert not np.array_equal(scene.vertices, other.vertices)
    # Icosphere pieces: every vertex at distance radius from its piece's centre.
    pieces = scene.vertices.reshape(100, 42, 3)
    np.testing.assert_allclose(np.linalg.norm(pieces - pieces.mean(axis=1, keepdims=True), axis=2), 0.05,
                               rtol=1e-9)


# --- speed -----------------------------------------------------------------------------------------

@pytest.mark.parametrize("lines", [
    'shape = "terrain"\nresolution = 720\n',                                       # 1,036,800 triangles
    'shape = "scatter"\npiece = "tetrahedron"\ncount = 262144\nstretch = [0.05, 1.0, 0.05]\n',  # 1,048,576
])
def test_a_million_generated_triangles_load_fast(tmp_path, lines):
    one_object(tmp_path, lines.replace("720", "8").replace("262144", "8"))  # imports, first calls
    # CPU time of this process, not wall time: other jobs on a shared 2-core machine do not count.
    start = time.process_time()
    scene = one_object(tmp_path, lines)
    seconds = time.process_time() - start
    assert scene.triangles > 1_000_000
    assert seconds < 2.0, f"{scene.triangles} generated triangles took {seconds:.2f} CPU seconds to load"


# --- demo scenes -------------------------------------------------------------------------------------

def test_meadow_demo_has_a_million_triangles_a_sky_and_a_sun():
    scene = load_scene(DEMO_SCENES / "meadow-million.toml")
    assert scene.triangles >= 1_000_000
    assert (scene.environment > 0.0).all() and scene.emitters.size > 0
    assert (scene.settings.width, scene.settings.height, scene.settings.samples, scene.settings.bounces) \
        == (640, 400, 64, 4)
    assert scene.warnings == ()


def test_needle_gallery_demo_size():
    scene = load_scene(DEMO_SCENES / "needle-gallery.toml")
    assert 200_000 <= scene.triangles <= 300_000
    assert scene.emitters.size > 0 and scene.warnings == ()


# --- errors ------------------------------------------------------------------------------------------

@pytest.mark.parametrize("path", BAD_PROCEDURAL, ids=[p.stem for p in BAD_PROCEDURAL])
def test_bad_procedural_scene_is_one_line_naming_file_table_and_key(path):
    # The contract (INTERFACE.md): bad input gives one line naming the file, the table and the key.
    first_line = path.read_text().split("\n", 1)[0]
    assert first_line.startswith("# expect: ")
    with pytest.raises(UserError) as raised:
        load_scene(path)
    message = str(raised.value)
    assert message.splitlines() == [message] and message.startswith(f"{path}: ")
    assert first_line.removeprefix("# expect: ") in message


def test_bad_procedural_corpus_is_found():
    # Guards the parametrised test above against silently running on an empty glob.
    assert len(BAD_PROCEDURAL) >= 30


def skeleton() -> dict:
    """A valid document with one terrain and one scatter using every key."""
    return {
        "camera": {"position": [0.0, 5.0, 20.0], "look_at": [0.0, 0.0, 0.0]},
        "materials": {"moss": {"type": "diffuse"}},
        "objects": [
            {"shape": "terrain", "center": [0.0, 0.0, 0.0], "size": [10.0, 10.0], "resolution": [6, 5],
             "height": 1.0, "feature_size": 3.0, "octaves": 3, "roughness": 0.5, "seed": 2,
             "material": "moss", "translate": [0.0, 0.0, 0.0], "rotate": [0.0, 10.0, 0.0], "scale": 1.0},
            {"shape": "scatter", "center": [0.0, 1.0, 0.0], "size": [2.0, 1.0, 2.0], "count": 5,
             "piece": "sphere", "subdivisions": 0, "radius": 0.1, "stretch": [1.0, 2.0, 1.0],
             "rotation": "about_y", "variation": 0.5, "seed": 4, "material": "moss"},
        ],
    }


KEYS = [(index, key) for index, entry in enumerate(skeleton()["objects"]) for key in entry]
values = st.one_of(
    st.booleans(), st.integers(-5, 5000), st.integers(), st.floats(), st.text(max_size=8),
    st.sampled_from(["terrain", "scatter", "sphere", "box", "tetrahedron", "random", "about_y", "none"]),
    st.lists(st.one_of(st.integers(-3, 300), st.floats()), max_size=4),
)


@settings(max_examples=120, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(changes=st.lists(st.tuples(st.sampled_from(KEYS), values | st.just(KeyError)), min_size=1, max_size=3))
def test_garbage_procedural_keys_give_a_scene_or_a_user_error(changes):
    # The contract (INTERFACE.md): any input gives a Scene or a one-line UserError, never a traceback.
    document = skeleton()
    for (index, key), value in changes:
        if value is KeyError:
            document["objects"][index].pop(key, None)
        else:
            document["objects"][index][key] = value
    path = SCENES / "garbage.toml"
    with np.errstate(over="raise", invalid="raise", divide="raise"):  # no silent overflow or NaN either
        try:
            scene = scene_from_document(document, path)
        except UserError as error:
            message = str(error)
            assert message.splitlines() == [message] and message.startswith(f"{path}: ")
            return
    assert scene.triangles > 0

"""Resource guards refuse early, with one line, what would not fit (issue 7: no out-of-memory kill)."""
import pytest

from tracer.errors import UserError
from tracer.resources import available_memory, check_fits, estimate_bytes


def test_estimate_grows_with_triangles_and_pixels():
    assert estimate_bytes("bvh", 2_000_000) == 2 * estimate_bytes("bvh", 1_000_000)
    assert estimate_bytes("kdtree", 1000) > estimate_bytes("bvh", 1000)      # references are duplicated
    assert estimate_bytes("bvh", 0, 200, 100) == 2 * estimate_bytes("bvh", 0, 100, 100)


def test_refuses_what_does_not_fit_and_names_the_file():
    with pytest.raises(UserError) as error:
        check_fits("scenes/huge.toml", "bvh", 10**9, 640, 400, available=8 * 2**30)
    message = str(error.value)
    assert "scenes/huge.toml" in message and "GiB" in message and "\n" not in message


def test_accepts_what_fits():
    check_fits("scenes/small.toml", "bvh", 1_000_000, 640, 400, available=8 * 2**30)


def test_available_memory_is_positive():
    assert available_memory() > 0


def test_render_of_an_absurd_image_fails_before_rendering(tmp_path):
    """16384 x 16384 pixels need ~70 GiB of buffers: refused at once, not killed halfway."""
    from tracer.cli import main
    scene = tmp_path / "wide.toml"
    scene.write_text('[camera]\nposition = [0.0, 0.0, 3.0]\nlook_at = [0.0, 0.0, 0.0]\n'
                     '[materials.grey]\ntype = "diffuse"\n[[objects]]\nshape = "box"\nmaterial = "grey"\n')
    if available_memory() > 200 * 2**30:
        pytest.skip("this machine could hold the buffers")
    assert main(["render", str(scene), "--width", "16384", "--height", "16384", "--quiet",
                 "--out", str(tmp_path)]) == 2

"""Atomic writes: a write that fails part-way leaves the previous file intact and no temporary behind.

Sources: writing to a temporary in the same folder and renaming it over the destination is common
practice for crash-safe replacement; that the rename replaces the name in one step is POSIX.1-2017,
rename() (from memory). New files get 0666 less the umask: POSIX.1-2017, open() with O_CREAT (from
memory), the mode Python's open() asks for.
"""
import json
import os

import numpy as np
import pytest

from tracer.diagnostics.heatmap import write_heatmaps
from tracer.io.atomic import atomic_open, atomic_path
from tracer.io.png import write_png
from tracer.io.stats_json import write_json
from tracer.render.driver import Checkpoint
from tracer.render.outputs import checkpoint_path, write_checkpoint

OLD_CONTENT = b"the previous file\n"


class WriterFailed(Exception):
    """Raised by the tests in the middle of a write."""


def folder_names(folder):
    return sorted(path.name for path in folder.iterdir())


@pytest.fixture
def old_file(tmp_path):
    path = tmp_path / "result.bin"
    path.write_bytes(OLD_CONTENT)
    return path


def test_success_replaces_the_file(old_file):
    with atomic_path(old_file) as temporary:
        assert temporary.parent == old_file.parent and temporary.name.startswith(".")
        temporary.write_bytes(b"new")
    assert old_file.read_bytes() == b"new"
    assert folder_names(old_file.parent) == ["result.bin"]


@pytest.mark.parametrize("failure", [WriterFailed, KeyboardInterrupt])  # an error, and Ctrl-C
def test_failure_mid_write_keeps_the_old_file(old_file, failure):
    with pytest.raises(failure):
        with atomic_path(old_file) as temporary:
            with open(temporary, "wb") as handle:
                handle.write(b"half of the new")
                handle.flush()
                raise failure
    assert old_file.read_bytes() == OLD_CONTENT
    assert folder_names(old_file.parent) == ["result.bin"]


def test_failure_mid_write_through_a_handle(old_file):
    with pytest.raises(WriterFailed):
        with atomic_open(old_file, "wb") as handle:
            handle.write(b"half of the new")
            raise WriterFailed
    assert old_file.read_bytes() == OLD_CONTENT
    assert folder_names(old_file.parent) == ["result.bin"]


def test_failed_rename_removes_the_temporary(tmp_path):
    destination = tmp_path / "taken"
    destination.mkdir()  # a folder cannot be replaced by a file
    with pytest.raises(IsADirectoryError):
        with atomic_open(destination, "w") as handle:
            handle.write("text")
    assert folder_names(tmp_path) == ["taken"] and destination.is_dir()


def test_new_files_get_the_umask_permissions(tmp_path):
    previous = os.umask(0o027)
    try:
        with atomic_open(tmp_path / "a.txt") as handle:
            handle.write("text")
        write_json(tmp_path / "b.json", {"x": 1})
    finally:
        os.umask(previous)
    for name in ("a.txt", "b.json"):
        assert (tmp_path / name).stat().st_mode & 0o777 == 0o640  # 0o666 & ~0o027


def test_json_that_fails_mid_dump_keeps_the_old_file(tmp_path):
    path = tmp_path / "stats.json"
    write_json(path, {"rays": 10})
    before = path.read_bytes()
    with pytest.raises(TypeError):  # json.dump has written "{"rays": 1, ... before it meets the set
        write_json(path, {"rays": 1, "bad": {1, 2}})
    assert path.read_bytes() == before and json.loads(before) == {"rays": 10}
    assert folder_names(tmp_path) == ["stats.json"]


def test_checkpoint_that_fails_mid_write_keeps_the_old_one(tmp_path):
    stem = tmp_path / "room-bvh"
    good = Checkpoint(np.ones((2, 3, 4)), 3, np.zeros((2, 8), np.int64), np.zeros(5, np.int64))
    path = write_checkpoint(stem, good, "fingerprint")
    assert path == checkpoint_path(stem)
    before = path.read_bytes()
    unpicklable = np.array([lambda: 0], dtype=object)  # np.savez pickles object arrays: this one fails
    with pytest.raises(Exception):  # noqa: B017 - pickle's error type differs between versions
        write_checkpoint(stem, good._replace(hist=unpicklable), "fingerprint")
    assert path.read_bytes() == before
    assert folder_names(tmp_path) == [path.name]
    with np.load(path) as data:
        assert int(data["samples_done"]) == 3 and str(data["fingerprint"]) == "fingerprint"


def test_png_and_heatmap_that_fail_mid_write_keep_the_old_files(tmp_path, monkeypatch):
    import imageio.v3 as iio
    from matplotlib.figure import Figure
    image_path = write_png(tmp_path / "image.png", np.zeros((4, 5, 3), np.uint8))
    heat_path = write_heatmaps(str(tmp_path / "heat.png"), [("a", np.ones((4, 5)))], "nodes")
    before = {name: (tmp_path / name).read_bytes() for name in ("image.png", "heat.png")}

    def half_a_png(target, *args, **options):
        with open(target, "wb") as handle:
            handle.write(b"\x89PNG\r\n")  # the first bytes of the signature, then the failure
        raise WriterFailed

    monkeypatch.setattr(iio, "imwrite", half_a_png)
    monkeypatch.setattr(Figure, "savefig", lambda figure, target, **options: half_a_png(target))
    with pytest.raises(WriterFailed):
        write_png(image_path, np.full((4, 5, 3), 255, np.uint8))
    with pytest.raises(WriterFailed):
        write_heatmaps(heat_path, [("a", np.full((4, 5), 2.0))], "nodes")
    assert {name: (tmp_path / name).read_bytes() for name in before} == before
    assert folder_names(tmp_path) == ["heat.png", "image.png"]

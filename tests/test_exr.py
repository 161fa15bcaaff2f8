"""EXR and PNG files: round trips, orientation, atomic writes and one-line errors for bad inputs.

Sources: the OpenEXR file layout ("OpenEXR File Layout" document of the OpenEXR project) for the raw
scanline check, the PNG specification (W3C / ISO/IEC 15948) for the 16-bit decoder, imageio as the
reference 8-bit reader, and the project contract (INTERFACE.md) for errors.
"""

import struct
import zlib

import imageio.v3 as iio
import numpy as np
import OpenEXR
import pytest

from tracer.errors import UserError
from tracer.io import read_exr, write_exr, write_png


def sample_channels(height=5, width=7):
    rng = np.random.default_rng(0)
    return {
        "R": rng.uniform(0, 10, (height, width)).astype(np.float32),
        "G": rng.uniform(0, 10, (height, width)).astype(np.float32),
        "B": np.arange(height * width, dtype=np.float32).reshape(height, width),
        "cost.nodes": rng.uniform(0, 50, (height, width)).astype(np.float16),
        "depth.Z": np.where(rng.random((height, width)) < 0.3, np.inf, 2.5).astype(np.float32),
        "id": np.arange(height * width, dtype=np.uint32).reshape(height, width) * 1000003,
    }


def test_round_trip_is_exact(tmp_path):
    channels = sample_channels()
    path = write_exr(tmp_path / "x.exr", channels, {"tracer.samples": 64, "tracer.scene": "room.toml",
                                                   "tracer.seconds": 1.5})
    read, header = read_exr(path)
    assert set(read) == set(channels)
    for name, values in channels.items():
        expected_dtype = np.uint32 if values.dtype == np.uint32 else np.float32  # HALF comes back float32
        assert read[name].dtype == expected_dtype
        assert np.array_equal(read[name], values.astype(expected_dtype)), name
    assert header["tracer.samples"] == 64 and header["tracer.scene"] == "room.toml"
    assert header["tracer.seconds"] == pytest.approx(1.5)
    assert "channels" not in header


def raw_first_scanline(path):
    """Parse an uncompressed single-part scanline EXR by the OpenEXR file layout: magic, version,
    header attributes (name\\0 type\\0 int32 size, value) ended by a null byte, the line offset table
    (uint64 per chunk; one scanline per chunk without compression), then chunks of
    int32 y, int32 size, and each channel's samples for that line, channels in alphabetical order."""
    data = path.read_bytes()
    assert data[:4] == b"\x76\x2f\x31\x01"
    position = 8
    attributes = {}
    while data[position] != 0:
        name_end = data.index(b"\0", position)
        type_end = data.index(b"\0", name_end + 1)
        name = data[position:name_end].decode()
        (size,) = struct.unpack_from("<i", data, type_end + 1)
        attributes[name] = data[type_end + 5:type_end + 5 + size]
        position = type_end + 5 + size
    position += 1
    x_min, y_min, x_max, y_max = struct.unpack("<4i", attributes["dataWindow"])
    (first_chunk,) = struct.unpack_from("<Q", data, position)
    y, size = struct.unpack_from("<2i", data, first_chunk)
    width = x_max - x_min + 1
    rows = np.frombuffer(data, dtype="<f4", count=size // 4, offset=first_chunk + 8).reshape(-1, width)
    return y, y_min, dict(zip(["B", "G", "R"], rows, strict=True))  # alphabetical channel order


def test_row_zero_is_the_top_scanline(tmp_path):
    # OpenEXR: y grows downwards, the data window's y_min is the top line. Our row 0 must be stored
    # as the line y = y_min, which an uncompressed file stores first.
    height, width = 4, 3
    channels = {name: np.zeros((height, width), np.float32) for name in "RGB"}
    channels["R"][0] = [1.0, 2.0, 3.0]  # only the top row is lit
    channels["G"][height - 1] = 9.0
    path = write_exr(tmp_path / "top.exr", channels, {"compression": OpenEXR.NO_COMPRESSION})
    y, y_min, first_line = raw_first_scanline(path)
    assert y == y_min == 0
    assert first_line["R"].tolist() == [1.0, 2.0, 3.0]
    assert first_line["G"].tolist() == [0.0, 0.0, 0.0]
    read, _ = read_exr(path)
    assert read["R"][0].tolist() == [1.0, 2.0, 3.0] and read["G"][-1].tolist() == [9.0] * 3


def test_write_is_atomic(tmp_path):
    path = tmp_path / "out" / "image.exr"  # missing folders are created
    write_exr(path, sample_channels())
    before = path.read_bytes()
    with pytest.raises(Exception):  # noqa: B017 - the bindings raise RuntimeError for this attribute
        write_exr(path, sample_channels(), {"unsupported": {"a": 1}})
    assert path.read_bytes() == before  # the old file survives a failed write
    assert [p.name for p in path.parent.iterdir()] == ["image.exr"]  # no temporary left behind
    write_exr(path, {name: np.ones((2, 2), np.float32) for name in "RGB"})
    assert read_exr(path)[0]["R"].shape == (2, 2)
    assert [p.name for p in path.parent.iterdir()] == ["image.exr"]


def assert_one_line_naming(error, path):
    message = str(error.value)
    assert "\n" not in message and str(path) in message


def test_missing_file_is_a_user_error(tmp_path):
    with pytest.raises(UserError, match="no such file") as error:
        read_exr(tmp_path / "absent.exr")
    assert_one_line_naming(error, tmp_path / "absent.exr")


def test_png_renamed_exr_is_a_user_error(tmp_path):
    fake = tmp_path / "picture.exr"
    iio.imwrite(fake, np.zeros((4, 4, 3), np.uint8), extension=".png")
    with pytest.raises(UserError, match="not an OpenEXR file") as error:
        read_exr(fake)
    assert_one_line_naming(error, fake)


def test_exr_without_rgb_is_a_user_error(tmp_path):
    path = write_exr(tmp_path / "depth.exr", {"depth.Z": np.ones((3, 3), np.float32)})
    with pytest.raises(UserError, match=r"no channel R, G, B \(has: depth.Z\)") as error:
        read_exr(path)
    assert_one_line_naming(error, path)
    channels, _ = read_exr(path, require=())  # auxiliary-only files can still be read on purpose
    assert set(channels) == {"depth.Z"}


def test_truncated_exr_is_a_user_error(tmp_path):
    whole = write_exr(tmp_path / "whole.exr", sample_channels(40, 50))
    cut = tmp_path / "cut.exr"
    cut.write_bytes(whole.read_bytes()[:200])
    with pytest.raises(UserError, match="cannot decode EXR") as error:
        channels, _ = read_exr(cut)
        # Some truncations decode the header but not the pixels; those must still not pass silently.
        assert all(np.isfinite(values).all() for values in channels.values())
    assert_one_line_naming(error, cut)


def test_directory_is_a_user_error(tmp_path):
    with pytest.raises(UserError) as error:
        read_exr(tmp_path)
    assert_one_line_naming(error, tmp_path)


def decode_png16(data):
    """Minimal PNG reader for our own output (PNG specification: chunks, zlib IDAT, filter type 0)."""
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    position, idat, header = 8, b"", None
    while position < len(data):
        (length,) = struct.unpack_from(">I", data, position)
        kind = data[position + 4:position + 8]
        body = data[position + 8:position + 8 + length]
        (crc,) = struct.unpack_from(">I", data, position + 8 + length)
        assert crc == zlib.crc32(kind + body)
        if kind == b"IHDR":
            header = struct.unpack(">IIBBBBB", body)
        elif kind == b"IDAT":
            idat += body
        position += 12 + length
    width, height, depth, colour_type = header[:4]
    channels = {2: 3, 6: 4}[colour_type]
    assert depth == 16
    raw = np.frombuffer(zlib.decompress(idat), dtype=np.uint8).reshape(height, -1)
    assert np.all(raw[:, 0] == 0)
    return raw[:, 1:].copy().view(">u2").reshape(height, width, channels).astype(np.uint16)


@pytest.mark.parametrize("channels", [3, 4])
def test_png_16_bit_round_trip(tmp_path, channels):
    image = np.random.default_rng(1).integers(0, 65536, (6, 9, channels)).astype(np.uint16)
    image[0, 0, 0] = 65535  # row 0 at the top
    path = write_png(tmp_path / "deep.png", image)
    assert np.array_equal(decode_png16(path.read_bytes()), image)
    assert iio.improps(path).shape[:2] == (6, 9)  # a valid PNG for the reference reader too


@pytest.mark.parametrize("channels", [3, 4])
def test_png_8_bit_round_trip(tmp_path, channels):
    image = np.random.default_rng(2).integers(0, 256, (6, 9, channels)).astype(np.uint8)
    path = write_png(tmp_path / "shallow.png", image)
    assert np.array_equal(iio.imread(path), image)
    assert [p.name for p in tmp_path.iterdir()] == ["shallow.png"]


def test_png_refuses_float_images(tmp_path):
    with pytest.raises(ValueError):
        write_png(tmp_path / "f.png", np.zeros((2, 2, 3), np.float32))

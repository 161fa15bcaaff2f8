"""OpenEXR reading and writing through the OpenEXR Python bindings (3.x `OpenEXR.File` API).

Row 0 of every array is the top scanline of the data window: OpenEXR's y axis points down
(OpenEXR, "Technical Introduction", pixel space), and the bindings return scanlines in increasing y.
Files are written atomically (`tracer.io.atomic`): a reader never sees a half-written image and an
interrupted run leaves the previous file intact. The bindings are imported on first use: they are not
needed to start the program.
"""

from pathlib import Path

import numpy as np

from tracer.errors import input_error
from tracer.io.atomic import atomic_path

EXR_MAGIC = b"\x76\x2f\x31\x01"  # OpenEXR file layout: magic number 20000630, little-endian
RGB_CHANNELS = ("R", "G", "B")
_SAMPLE_TYPES = {np.dtype(np.float16), np.dtype(np.float32), np.dtype(np.uint32)}


def read_exr(path, require: tuple[str, ...] = RGB_CHANNELS) -> tuple[dict[str, np.ndarray], dict]:
    """Read the first part of an EXR file.

    Returns (channels, header): channel name -> (H, W) array, float32 for HALF and FLOAT samples and
    uint32 for UINT ones; header is the file's attribute dict without its channel list. Raises
    `UserError` (one line naming the file) if the file is missing, is not an EXR, cannot be decoded,
    or lacks a channel of `require` (by default R, G and B).
    """
    path = Path(path)
    if not path.is_file():
        raise input_error(path, None, None, "no such file")
    try:
        with open(path, "rb") as handle:
            magic = handle.read(4)
    except OSError as error:
        raise input_error(path, None, None, f"cannot read: {error.strerror}") from None
    if magic != EXR_MAGIC:
        raise input_error(path, None, None, "not an OpenEXR file")
    import OpenEXR
    try:
        image = OpenEXR.File(str(path), separate_channels=True)
        header = dict(image.header())
        part_channels = image.channels()
    except Exception as error:  # the bindings raise RuntimeError with multi-line text
        reason = str(error).splitlines()[0] if str(error) else type(error).__name__
        raise input_error(path, None, None, f"cannot decode EXR ({reason})") from None
    header.pop("channels", None)
    channels = {}
    for name, channel in part_channels.items():
        pixels = np.asarray(channel.pixels)
        if pixels.dtype == np.float16:
            pixels = pixels.astype(np.float32)
        channels[name] = pixels
    missing = [name for name in require if name not in channels]
    if missing:
        available = ", ".join(sorted(channels)[:12]) or "none"
        raise input_error(path, None, None, f"no channel {', '.join(missing)} (has: {available})")
    shape = channels[require[0]].shape if require else None
    for name in require:
        if channels[name].shape != shape:
            raise input_error(path, None, None, f"channel {name} is subsampled; only full-resolution "
                                                f"{', '.join(require)} are supported")
    return channels, header


def write_exr(path, channels: dict[str, np.ndarray], header: dict | None = None) -> Path:
    """Write (H, W) channels to a single-part scanline EXR, atomically; returns the path.

    float32 and float16 arrays are stored as FLOAT and HALF, uint32 as UINT, other floats as FLOAT.
    `header` adds attributes (str, int, float, numpy vectors); compression defaults to ZIP.
    """
    import OpenEXR
    path = Path(path)
    if not channels:
        raise ValueError("an EXR needs at least one channel")
    prepared = {}
    shape = None
    for name, values in channels.items():
        array = np.asarray(values)
        if array.dtype not in _SAMPLE_TYPES:
            array = array.astype(np.float32)
        if array.ndim != 2:
            raise ValueError(f"channel {name} must be (H, W), got {array.shape}")
        if shape is None:
            shape = array.shape
        elif array.shape != shape:
            raise ValueError(f"channel {name} is {array.shape}, expected {shape}")
        prepared[name] = np.ascontiguousarray(array)
    attributes = {"compression": OpenEXR.ZIP_COMPRESSION, "type": OpenEXR.scanlineimage}
    attributes.update(header or {})  # a copy: the bindings add the windows to the dict they get
    path.parent.mkdir(parents=True, exist_ok=True)
    with atomic_path(path) as temporary:
        OpenEXR.File(attributes, prepared).write(str(temporary))
    return path

"""Resource guards: estimate the memory a build or a render needs and refuse early, with a clear message,
what would not fit, instead of being killed by the out-of-memory killer halfway through."""
import os

from tracer.errors import UserError

# Bytes per triangle while building and holding a structure (measured peaks, rounded up): the scene's
# own arrays, the builder's per-triangle temporaries, nodes, references and leaf triangle copies.
BYTES_PER_TRIANGLE = {"bvh": 260, "kdtree": 700, "brute": 120}
# Bytes per pixel of a render: float64 sums and float32 pass buffer of 14 channels, float32 outputs.
BYTES_PER_PIXEL = 14 * (8 + 4 + 4) + 64
USABLE_FRACTION = 0.8


def available_memory() -> int:
    """Bytes the system can still give us (MemAvailable), or a large number where unknown."""
    try:
        with open("/proc/meminfo") as handle:
            for line in handle:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    try:
        return os.sysconf("SC_AVPHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")
    except (ValueError, OSError, AttributeError):
        return 1 << 62


def estimate_bytes(kind: str, triangles: int, width: int = 0, height: int = 0) -> int:
    return BYTES_PER_TRIANGLE.get(kind, 700) * int(triangles) + BYTES_PER_PIXEL * int(width) * int(height)


def check_fits(what: str, kind: str, triangles: int, width: int = 0, height: int = 0,
               available: int | None = None) -> None:
    """Raise UserError when the estimate exceeds the usable share of the available memory."""
    need = estimate_bytes(kind, triangles, width, height)
    have = available_memory() if available is None else available
    if need > USABLE_FRACTION * have:
        raise UserError(f"{what}: needs about {need / 2**30:.1f} GiB ({triangles:,} triangles through "
                        f"{kind}, {width}x{height} pixels) but only {have / 2**30:.1f} GiB is available")

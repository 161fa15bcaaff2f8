"""Resource guards: estimate the memory a build or a render needs and refuse early, with a clear message,
what would not fit, instead of being killed by the out-of-memory killer halfway through."""
import os

from tracer.errors import UserError

# Bytes per triangle while building and holding a structure (measured peaks, rounded up): the scene's
# own arrays, the builder's per-triangle temporaries, nodes, references and leaf triangle copies. Keyed
# by kind, or by "kind:build" where the builds differ: the kd-tree's median build duplicates more
# references than its SAH build (measured 954 bytes per triangle).
BYTES_PER_TRIANGLE = {"bvh": 260, "kdtree:sah": 700, "kdtree:median": 1000, "brute": 120}
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


def bytes_per_triangle(spec: str) -> int:
    """The estimate for a structure "kind" or "kind:build"; a bare kind whose builds differ gets the
    largest of them (the caller did not say which build)."""
    if spec in BYTES_PER_TRIANGLE:
        return BYTES_PER_TRIANGLE[spec]
    kind = spec.partition(":")[0]
    builds = [v for k, v in BYTES_PER_TRIANGLE.items() if k == kind or k.startswith(kind + ":")]
    return max(builds) if builds else max(BYTES_PER_TRIANGLE.values())


def estimate_bytes(kind: str, triangles: int, width: int = 0, height: int = 0) -> int:
    """Bytes to build `kind` ("kind" or "kind:build") over `triangles` and render width x height."""
    return bytes_per_triangle(kind) * int(triangles) + BYTES_PER_PIXEL * int(width) * int(height)


def check_fits(what: str, kind: str, triangles: int, width: int = 0, height: int = 0,
               available: int | None = None) -> None:
    """Raise UserError when the estimate exceeds the usable share of the available memory."""
    need = estimate_bytes(kind, triangles, width, height)
    have = available_memory() if available is None else available
    if need > USABLE_FRACTION * have:
        raise UserError(f"{what}: needs about {need / 2**30:.1f} GiB ({triangles:,} triangles through "
                        f"{kind}, {width}x{height} pixels) but only {have / 2**30:.1f} GiB is available")

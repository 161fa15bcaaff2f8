"""Time each tone-mapping operator on a 3840x2160 synthetic HDR image (median of 3 runs).

Usage: python benchmarks/bench_tonemap.py [--width 3840] [--height 2160] [--repeats 3]

The image is a scenario of our own: a dim textured room with a shadowed corner, a bright window and a
small lamp, about seven decades of luminance, with mild per-pixel noise. Kernels are compiled (or
loaded from the numba cache) by a warm-up call on a small image before timing.
Reported per operator: `tonemap` alone, `display_image` (tonemap + sRGB encoding + 8-bit codes),
and `tonemap_file` (read a ZIP-compressed float32 EXR, display_image, write the 8-bit PNG).
"""

import argparse
import statistics
import tempfile
import time
from pathlib import Path

import numpy as np

from tracer.io import write_exr
from tracer.tonemap import OPERATORS, display_image, tonemap, tonemap_file


def synthetic_hdr(height: int, width: int, seed: int = 0) -> np.ndarray:
    """(height, width, 3) float32 linear radiance of the room described above."""
    rng = np.random.default_rng(seed)
    rows = np.linspace(0.0, 1.0, height)[:, None]
    cols = np.linspace(0.0, 1.0, width)[None, :]
    wall = (0.02 + 0.05 * cols) * (1.0 + 0.3 * np.sin(cols * 400.0) * np.sin(rows * 300.0))
    window = (cols > 0.6) & (cols < 0.85) & (rows > 0.15) & (rows < 0.55)
    lamp = (cols - 0.25) ** 2 + (rows - 0.3) ** 2 < 0.002
    shadow = (cols > 0.1) & (cols < 0.4) & (rows > 0.7)
    y = np.where(window, 50.0 * (1.0 + 0.5 * rows), wall)
    y = np.where(lamp, 2000.0, y)
    y = np.where(shadow, 0.01 * y, y)
    colour = np.where(window[..., None], np.array([0.6, 0.8, 1.2]), np.array([1.0, 0.9, 0.7]))
    rgb = y[..., None] * colour * np.exp(rng.normal(0.0, 0.05, (height, width, 3)))
    return rgb.astype(np.float32)


def median_seconds(function, repeats: int) -> tuple[float, float]:
    """Median wall-clock and median process CPU seconds (all threads) of `repeats` calls. On a shared
    machine the CPU time is the steadier figure; wall time on an idle 2-core machine lies between
    half of it (perfectly parallel) and all of it (serial)."""
    walls, cpus = [], []
    for _ in range(repeats):
        start_wall, start_cpu = time.perf_counter(), time.process_time()
        function()
        walls.append(time.perf_counter() - start_wall)
        cpus.append(time.process_time() - start_cpu)
    return statistics.median(walls), statistics.median(cpus)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--width", type=int, default=3840)
    parser.add_argument("--height", type=int, default=2160)
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()
    warm = synthetic_hdr(32, 48)
    for name in OPERATORS:
        display_image(warm, name, bits=8)
        display_image(warm, name, bits=16, dither=True)
    radiance = synthetic_hdr(args.height, args.width)
    print(f"{args.width}x{args.height}, median of {args.repeats}; seconds as wall (cpu)")
    print(f"{'operator':<10} {'tonemap':>14} {'display_image':>14} {'tonemap_file':>14}")
    with tempfile.TemporaryDirectory() as folder:
        source = write_exr(Path(folder) / "bench.exr", {c: radiance[..., i] for i, c in enumerate("RGB")})
        for name in OPERATORS:
            mapped = median_seconds(lambda name=name: tonemap(radiance, name), args.repeats)
            shown = median_seconds(lambda name=name: display_image(radiance, name), args.repeats)
            filed = median_seconds(lambda name=name: tonemap_file(source, operator=name), args.repeats)
            cells = " ".join(f"{f'{wall:.2f} ({cpu:.2f})':>14}" for wall, cpu in (mapped, shown, filed))
            print(f"{name:<10} {cells}")


if __name__ == "__main__":
    main()

"""Two-thread against one-thread throughput of `Accel.intersect`, measured in alternating pairs.

    python benchmarks/bench_scaling.py [--pairs 21] [--kind bvh] [--freq 224]

The mesh and rays are those of `benchmarks/bench_rayref.py` (shared/tools/rayref's displaced icosphere,
1,003,520 triangles at --freq 224; its camera and diffuse-bounce rays). Each pair times one call on 1
thread and then one on 2, back to back, so a burst of other work on the machine hits both halves of a
pair alike; the figure is the median over pairs of the time ratio, with its quartiles. Timing many
1-thread calls first and many 2-thread calls afterwards lets the load drift in between.
"""
import argparse
import os
import sys

import numba
import numpy as np
from bench_rayref import _load_rayref, _timed  # beside this script: on the path when it is run


def main(argv=None) -> int:
    from tracer import build_accel
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--pairs", type=int, default=21)
    parser.add_argument("--kind", default="bvh", help="structure SPEC (default bvh)")
    parser.add_argument("--freq", type=int, default=224, help="icosphere frequency: 20*freq^2 triangles")
    args = parser.parse_args(argv)
    _, scenes = _load_rayref()
    threads = min(2, numba.config.NUMBA_NUM_THREADS)
    vertices, faces = scenes.displaced_icosphere(freq=args.freq)
    accel = build_accel(vertices, faces, kind=args.kind)
    print(f"{len(faces):,} triangles, {args.kind}; load average at start {os.getloadavg()[0]:.2f}")
    for name, (origins, directions) in (("camera", scenes.camera_rays(vertices)),
                                        ("diffuse", scenes.diffuse_rays(vertices, faces))):
        accel.intersect(origins, directions)                  # warm-up (and JIT)
        pairs = []
        for _ in range(args.pairs):
            numba.set_num_threads(1)
            one = _timed(lambda o=origins, d=directions: accel.intersect(o, d))
            numba.set_num_threads(threads)
            two = _timed(lambda o=origins, d=directions: accel.intersect(o, d))
            pairs.append((one, two))
        pairs = np.array(pairs)
        ratio = pairs[:, 0] / pairs[:, 1]
        rate = len(origins) / np.median(pairs, axis=0) / 1e6
        print(f"{name:8s} {threads}t/1t {np.median(ratio):.3f} (quartiles {np.percentile(ratio, 25):.3f}-"
              f"{np.percentile(ratio, 75):.3f}, {args.pairs} pairs); 1 thread {rate[0]:.2f} Mrays/s, "
              f"{threads} threads {rate[1]:.2f}")
    print(f"load average at end {os.getloadavg()[0]:.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())

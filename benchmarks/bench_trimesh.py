"""Our BVH against trimesh's pure-numpy ray/mesh reference, per ray, in one process.

    python benchmarks/bench_trimesh.py [--triangles 200000] [--rounds 3] [--subset 2048]

trimesh's `trimesh.ray.ray_triangle.RayMeshIntersector` (an r-tree of triangle boxes for candidates,
then a vectorised numpy triangle test) is the reference every Python user has at hand. Both trace the
same camera and diffuse-bounce rays of the generated displaced sphere (`tracer.bench.scenes`); trimesh
traces a strided subset (it is slow), ours every ray, and the figure is the ratio of the seconds per
ray, median over rounds, after a warm-up of each. Hits on the subset must agree (closest triangle).
"""
import argparse
import os
import sys
import time

import numpy as np


def _seconds(fn, rounds: int) -> float:
    fn()                                    # warm-up (JIT, r-tree, caches)
    times = []
    for _ in range(rounds):
        start = time.perf_counter()
        fn()
        times.append(time.perf_counter() - start)
    return float(np.median(times))


def main(argv=None) -> int:
    from trimesh import Trimesh
    from trimesh.ray.ray_triangle import RayMeshIntersector

    from tracer import build_accel
    from tracer.bench.scenes import bounce_rays, camera_rays, make_scene

    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--triangles", type=int, default=200_000)
    parser.add_argument("--rounds", type=int, default=3)
    parser.add_argument("--subset", type=int, default=2048, help="rays traced by trimesh per set")
    args = parser.parse_args(argv)
    print(f"load average at start {os.getloadavg()[0]:.2f}")
    scene = make_scene("sphere", args.triangles)
    accel = build_accel(scene.vertices, scene.faces, kind="bvh")
    origins, directions = camera_rays(scene.camera, 512, 512)
    hits = accel.intersect(origins, directions)
    ray_sets = {"camera": (origins, directions),
                "diffuse": bounce_rays(scene.vertices, scene.faces, origins, directions, hits.t,
                                       hits.triangle, len(origins))}
    reference = RayMeshIntersector(Trimesh(scene.vertices, scene.faces, process=False))
    print(f"{len(scene.faces):,} triangles")
    for name, (o, d) in ray_sets.items():
        stride = max(1, len(o) // args.subset)
        o_sub, d_sub = o[::stride].astype(np.float64), d[::stride].astype(np.float64)
        ours = _seconds(lambda o=o, d=d: accel.intersect(o, d), args.rounds) / len(o)
        theirs = _seconds(lambda o=o_sub, d=d_sub: reference.intersects_id(
            o, d, multiple_hits=False, return_locations=True), args.rounds) / len(o_sub)
        tri, ray, _ = reference.intersects_id(o_sub, d_sub, multiple_hits=False, return_locations=True)
        expected = np.full(len(o_sub), -1)
        expected[ray] = tri
        agree = float(np.mean(accel.intersect(o_sub, d_sub).triangle == expected))
        print(f"{name:8s} ours {1e9 * ours:8.1f} ns/ray ({1e-6 / ours:.2f} Mrays/s), trimesh "
              f"{1e6 * theirs:8.1f} us/ray on {len(o_sub)} rays; ours {theirs / ours:,.0f}x faster; "
              f"same closest triangle on {100 * agree:.2f}% of the subset")
    print(f"load average at end {os.getloadavg()[0]:.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())

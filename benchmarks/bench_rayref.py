"""Our BVH against the scalar C reference (shared/tools/rayref), back to back on the same mesh and rays.

    python benchmarks/bench_rayref.py [--freq 224] [--rounds 5] [--build sah]

Prints, per ray set (camera, diffuse), the median over rounds of our Mrays/s and the C reference's
(1 and 2 threads), their ratios, nodes and triangles per ray for both trees, and the build times.
Numbers on this machine are noisy: quote medians and ratios, never single runs.

Nodes per ray are not counted alike: the reference's binary tree counts each inner node and leaf it
processes, our 4-wide tree each 4-wide record and leaf (tracer/accel/_traverse.py), so ours is about
half for the same work. Triangles per ray count the same way in both.
"""
import argparse
import json
import os
import sys
import time

import numba
import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
RAYREF = os.path.normpath(os.path.join(HERE, "..", "..", "shared", "tools", "rayref"))


def _load_rayref():
    if not os.path.isdir(RAYREF):
        sys.exit(f"bench_rayref: the reference tool is not at {RAYREF}")
    sys.path.insert(0, RAYREF)
    import rayref  # noqa: I001 (both come from RAYREF, put on the path just above)
    import scenes
    return rayref, scenes


def _rate(fn, n_rays: int, reps: int = 3) -> float:
    fn()                                   # warm-up (and JIT)
    best = min(_timed(fn) for _ in range(reps))
    return n_rays / best / 1e6


def _timed(fn) -> float:
    start = time.perf_counter()
    fn()
    return time.perf_counter() - start


def main(argv=None) -> int:
    from tracer import build_accel
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--freq", type=int, default=224, help="icosphere frequency: 20*freq^2 triangles")
    parser.add_argument("--rounds", type=int, default=5)
    parser.add_argument("--build", default="sah")
    parser.add_argument("--json", metavar="FILE")
    args = parser.parse_args(argv)
    rayref, scenes = _load_rayref()
    print(f"load average at start {os.getloadavg()[0]:.2f} (2-thread figures mean little above ~0.3)")
    vertices, faces = scenes.displaced_icosphere(freq=args.freq)
    ray_sets = {"camera": scenes.camera_rays(vertices), "diffuse": scenes.diffuse_rays(vertices, faces)}
    builds = [_timed(lambda: build_accel(vertices, faces, kind="bvh", build=args.build))
              for _ in range(3)]
    accel = build_accel(vertices, faces, kind="bvh", build=args.build)
    stats = accel.stats()
    report = {"triangles": len(faces), "build_s_median": float(np.median(builds)),
              "sah_cost": stats["sah_cost"], "sets": {}}
    print(f"{len(faces):,} triangles; our build median {np.median(builds):.2f} s "
          f"(SAH cost {stats['sah_cost']:.1f})")
    for name, (origins, directions) in ray_sets.items():
        rows = []
        for _ in range(args.rounds):
            ref = rayref.run(vertices, faces, origins, directions, threads=2)
            numba.set_num_threads(1)
            ours_1 = _rate(lambda o=origins, d=directions: accel.intersect(o, d), len(origins))
            numba.set_num_threads(numba.config.NUMBA_NUM_THREADS)
            ours_n = _rate(lambda o=origins, d=directions: accel.intersect(o, d), len(origins))
            rows.append((ours_1, ours_n, ref["mrays_per_s_1t"], ref["mrays_per_s_nt"], ref["build_s"]))
        hits = accel.intersect(origins, directions)
        agree = rayref.agreement(ref["t"], ref["triangle"], hits.t, hits.triangle)
        med = np.median(np.array(rows), axis=0)
        ratio_1 = np.median([r[0] / r[2] for r in rows])
        ratio_n = np.median([r[1] / r[3] for r in rows])
        entry = {"ours_1t": med[0], "ours_2t": med[1], "ref_1t": med[2], "ref_2t": med[3],
                 "ratio_1t": ratio_1, "ratio_2t": ratio_n, "scaling_ours": med[1] / med[0],
                 "ref_build_s": med[4], "nodes_per_ray": float(hits.nodes.mean()),
                 "tris_per_ray": float(hits.tris.mean()), "ref_nodes_per_ray": ref["nodes_per_ray"],
                 "ref_tris_per_ray": ref["tris_per_ray"], "agreement": agree}
        report["sets"][name] = entry
        print(f"{name:8s} ours {med[0]:.2f} / {med[1]:.2f} Mrays/s (1/2 threads), "
              f"C {med[2]:.2f} / {med[3]:.2f}; ratio {ratio_1:.2f} (1t) {ratio_n:.2f} (2t); "
              f"2t/1t {med[1] / med[0]:.2f}; nodes/ray {entry['nodes_per_ray']:.1f} (4-wide) vs "
              f"{ref['nodes_per_ray']:.1f} (binary), tris/ray {entry['tris_per_ray']:.1f} "
              f"vs {ref['tris_per_ray']:.1f}; {agree}")
    print(f"load average at end {os.getloadavg()[0]:.2f}")
    if args.json:
        with open(args.json, "w") as handle:
            json.dump(report, handle, indent=2, default=float)
    return 0


if __name__ == "__main__":
    sys.exit(main())

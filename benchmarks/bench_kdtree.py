"""kd-tree against BVH traversal throughput, back to back in one process, through both traversal paths.

    python benchmarks/bench_kdtree.py [--scene scenes/meadow-million.toml] [--width 640 --height 400]
                                      [--rounds 5] [--kd kdtree] [--bvh bvh] [--render-size 160x100]
                                      [--threads N] [--clock wall|cpu] [--no-render] [--no-per-ray]
                                      [--json FILE]

Ray sets: camera rays (one through each pixel centre of the scene camera at WIDTH x HEIGHT, pinhole) and
diffuse-bounce rays (one from each camera hit, cosine-distributed about the geometric normal on the
side the camera ray came from: Malley's method, Pharr, Jakob & Humphreys, "Physically Based
Rendering", 3rd ed., section 13.6.3, from memory).

Paths measured, each as the median over rounds of Mrays/s and of the kd/BVH time ratio (both
structures measured back to back in every round, so the ratio is steadier than either figure):
  stream    `Accel.intersect` (`tracer.accel._traverse.intersect_rays`: the BVH's rays in flight, the
            kd-tree's one walk per ray, which measured faster for it);
  per-ray   `closest_hit` one ray after another in the same parallel loop, the call the integrator
            makes (`intersect_rays` with stream=False);
  render    one small render per structure through `tracer.render.driver.render` (camera, bounce and
            shadow rays; its own Mrays/s, always wall-clock).
Also printed: nodes/ray and triangles/ray of each structure on each ray set (what they count: the
module docstrings of `tracer.accel._traverse` and `tracer.accel._kdtraverse`), the kd-tree's references
per triangle and memory, and the load average (2-thread figures mean little above ~0.3).
"""
import argparse
import json
import os
import sys
import time

import numba
import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
DEFAULT_SCENE = os.path.normpath(os.path.join(HERE, "..", "scenes", "meadow-million.toml"))


def camera_rays(scene, width: int, height: int) -> tuple[np.ndarray, np.ndarray]:
    """(W H, 3) float32 origins and unit directions through the pixel centres (pinhole, row 0 on top)."""
    from tracer.render.camera import C_ASPECT, C_FWD, C_POS, C_RIGHT, C_TAN_HALF, C_UP, camera_params
    cam = camera_params(scene.camera, width, height)
    rows, cols = np.mgrid[0:height, 0:width]
    sx = (2.0 * (cols.ravel() + 0.5) / width - 1.0) * cam[C_TAN_HALF] * cam[C_ASPECT]
    sy = (1.0 - 2.0 * (rows.ravel() + 0.5) / height) * cam[C_TAN_HALF]
    d = cam[C_FWD:C_FWD + 3] + sx[:, None] * cam[C_RIGHT:C_RIGHT + 3] + sy[:, None] * cam[C_UP:C_UP + 3]
    d /= np.linalg.norm(d, axis=1, keepdims=True)
    o = np.broadcast_to(cam[C_POS:C_POS + 3], d.shape)
    return np.ascontiguousarray(o, np.float32), np.ascontiguousarray(d, np.float32)


def diffuse_rays(scene, origins, directions, hits, seed: int = 7) -> tuple[np.ndarray, np.ndarray]:
    """From each hit, a cosine-distributed direction about the normal facing the incoming ray."""
    hit = hits.triangle >= 0
    tri = scene.vertices[scene.faces[hits.triangle[hit]]]                  # (H, 3, 3)
    n = np.cross(tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 0])
    n /= np.linalg.norm(n, axis=1, keepdims=True)
    d_in = directions[hit].astype(np.float64)
    n *= -np.sign(np.einsum("ij,ij->i", n, d_in))[:, None]                # face the incoming ray
    p = origins[hit] + hits.t[hit, None].astype(np.float64) * d_in
    rng = np.random.default_rng(seed)
    u1, u2 = rng.random(len(n)), rng.random(len(n))
    r, phi = np.sqrt(u1), 2.0 * np.pi * u2
    # Orthonormal basis about n: Duff et al. (2017), "Building an Orthonormal Basis, Revisited", JCGT 6(1).
    s = np.where(n[:, 2] >= 0.0, 1.0, -1.0)
    a = -1.0 / (s + n[:, 2])
    b = n[:, 0] * n[:, 1] * a
    t1 = np.stack([1.0 + s * n[:, 0] ** 2 * a, s * b, -s * n[:, 0]], axis=1)
    t2 = np.stack([b, s + n[:, 1] ** 2 * a, -n[:, 1]], axis=1)
    d = (r * np.cos(phi))[:, None] * t1 + (r * np.sin(phi))[:, None] * t2 + np.sqrt(1.0 - u1)[:, None] * n
    scale = float(np.abs(scene.vertices).max())
    o = p + n * (1e-5 * scale)                                             # off the surface
    return np.ascontiguousarray(o, np.float32), np.ascontiguousarray(d, np.float32)


def _trace(accel, origins, directions, stream: bool) -> None:
    """`tracer.accel._traverse.intersect_rays` on all cores: with `stream` what `Accel.intersect` does,
    without it one ray after another through `closest_hit`, the integrator's call."""
    from tracer.accel._traverse import intersect_rays
    n = len(origins)
    out = [np.empty(n, dtype) for dtype in (np.float32, np.int32, np.float32, np.float32, np.int32, np.int32)]
    intersect_rays(accel.tree, origins, directions, np.full(n, np.inf, np.float32), True, stream, *out)


def _seconds(clock, fn, *args) -> float:
    start = clock()
    fn(*args)
    return clock() - start


def main(argv=None) -> int:
    import tracer
    from tracer.render.driver import render
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--scene", default=DEFAULT_SCENE)
    parser.add_argument("--width", type=int, default=640)
    parser.add_argument("--height", type=int, default=400)
    parser.add_argument("--rounds", type=int, default=5)
    parser.add_argument("--kd", default="kdtree", help="kd-tree SPEC (default: the SAH build)")
    parser.add_argument("--bvh", default="bvh", help="BVH SPEC")
    parser.add_argument("--render-size", default="160x100", help="WxH of the small render (1 sample)")
    parser.add_argument("--no-render", action="store_true", help="skip the render measurement")
    parser.add_argument("--no-per-ray", action="store_true", help="skip the per-ray measurement")
    parser.add_argument("--threads", type=int, default=0, help="numba threads (default: all)")
    parser.add_argument("--clock", choices=("wall", "cpu"), default="wall",
                        help="wall: elapsed time; cpu: the process's CPU time (Mrays per CPU-second), "
                             "which time slices lost to other work on a shared machine do not inflate")
    parser.add_argument("--json", metavar="FILE")
    args = parser.parse_args(argv)
    if args.threads:
        numba.set_num_threads(args.threads)
    clock = time.perf_counter if args.clock == "wall" else time.process_time
    print(f"load average at start {os.getloadavg()[0]:.2f}; {numba.get_num_threads()} threads, "
          f"{args.clock} clock")
    scene = tracer.load_scene(args.scene)
    accels = {}
    for name, spec in (("bvh", args.bvh), ("kd", args.kd)):
        accels[name] = tracer.build_accel(scene.vertices, scene.faces, kind=spec)
        print(f"{spec}: built in {accels[name].build_seconds:.1f} s")
    kd_stats = accels["kd"].stats()
    refs_per_tri = len(accels["kd"].tree.refs) / max(scene.triangles, 1)
    report = {"triangles": scene.triangles, "kd_refs_per_triangle": refs_per_tri,
              "kd_memory_bytes": kd_stats.get("memory_bytes"), "bvh_memory_bytes":
              accels["bvh"].stats().get("memory_bytes"), "sets": {}, "render": {}}
    print(f"{scene.triangles:,} triangles; kd references/triangle {refs_per_tri:.2f}, kd memory "
          f"{report['kd_memory_bytes']}, bvh memory {report['bvh_memory_bytes']}")
    origins, directions = camera_rays(scene, args.width, args.height)
    first = accels["bvh"].intersect(origins, directions)
    ray_sets = {"camera": (origins, directions), "diffuse": diffuse_rays(scene, origins, directions, first)}
    for set_name, (o, d) in ray_sets.items():
        n = len(o)
        entry = {"rays": n}
        hits = {name: accel.intersect(o, d) for name, accel in accels.items()}     # warm-up and counts
        agree = float(np.mean(hits["bvh"].triangle == hits["kd"].triangle))
        for name in accels:
            entry[f"{name}_nodes_per_ray"] = float(hits[name].nodes.mean())
            entry[f"{name}_tris_per_ray"] = float(hits[name].tris.mean())
        paths = {"stream": True} if args.no_per_ray else {"stream": True, "per-ray": False}
        for stream in paths.values():
            for accel in accels.values():
                _trace(accel, o, d, stream)                                    # warm-up
        for path, stream in paths.items():
            rows = []
            for _ in range(args.rounds):
                t_bvh = _seconds(clock, _trace, accels["bvh"], o, d, stream)
                t_kd = _seconds(clock, _trace, accels["kd"], o, d, stream)
                rows.append((n / t_bvh / 1e6, n / t_kd / 1e6, t_kd / t_bvh))
            med = np.median(np.array(rows), axis=0)
            entry[path] = {"bvh_mrays": med[0], "kd_mrays": med[1], "ratio": med[2]}
            print(f"{set_name:8s} {path:8s} bvh {med[0]:.2f} Mrays/s, kd {med[1]:.2f} Mrays/s, "
                  f"kd/bvh time {med[2]:.2f}  (load {os.getloadavg()[0]:.2f})")
        print(f"{set_name:8s} nodes/ray bvh {entry['bvh_nodes_per_ray']:.1f} "
              f"kd {entry['kd_nodes_per_ray']:.1f}; "
              f"tris/ray bvh {entry['bvh_tris_per_ray']:.1f} kd {entry['kd_tris_per_ray']:.1f}; "
              f"same triangle hit {agree:.5f}")
        report["sets"][set_name] = entry
    if not args.no_render:
        w, h = (int(x) for x in args.render_size.lower().split("x"))
        rows = []
        for _ in range(max(1, args.rounds // 2)):
            rates = {}
            for name, accel in accels.items():
                stats = render(scene, accel=accel, samples=1, width=w, height=h,
                               threads=args.threads or None).stats
                rates[name] = stats["render"]["mrays_per_s"]
                report["render"][f"{name}_nodes_per_ray"] = stats["cost"]["nodes_per_ray"]["mean"]
                report["render"][f"{name}_tris_per_ray"] = stats["cost"]["tris_per_ray"]["mean"]
            rows.append((rates["bvh"], rates["kd"], rates["bvh"] / rates["kd"]))
        med = np.median(np.array(rows), axis=0)
        report["render"].update({"bvh_mrays": med[0], "kd_mrays": med[1], "ratio": med[2]})
        r = report["render"]
        print(f"render   {w}x{h}x1 bvh {med[0]:.2f} Mrays/s, kd {med[1]:.2f} Mrays/s, kd/bvh time "
              f"{med[2]:.2f}; nodes/ray bvh {r['bvh_nodes_per_ray']:.1f} kd {r['kd_nodes_per_ray']:.1f}; "
              f"tris/ray bvh {r['bvh_tris_per_ray']:.1f} kd {r['kd_tris_per_ray']:.1f}")
    print(f"load average at end {os.getloadavg()[0]:.2f}")
    if args.json:
        with open(args.json, "w") as handle:
            json.dump(report, handle, indent=2, default=float)
    return 0


if __name__ == "__main__":
    sys.exit(main())

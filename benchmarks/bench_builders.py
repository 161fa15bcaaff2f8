"""The three BVH builds side by side: build seconds, tree quality, ray throughput and the break-even.

    python benchmarks/bench_builders.py [--scenes sphere terrain] [--sizes 1000000 5000000]
                                        [--repeats 3] [--resolution 512] [--json out.json]

For each generated mesh (`tracer.bench.scenes`) the builds `bvh:sah` (binned SAH), `bvh:median` and
`bvh:lbvh` (Morton-code linear BVH) are built `repeats` times, one of each in turn, so every round
compares builds measured back to back; the figure is the median of the rounds (build seconds as
`build_accel` measures them), and the ratio to `bvh:sah` is the median of the per-round ratios.
Tree quality: the SAH cost and the end-point overlap (EPO) of the "build" statistics.

Rays: camera rays (resolution^2, one per pixel) and as many diffuse-bounce rays leaving the SAH tree's
camera hits; every tree traces the same rays through `Accel.intersect` on all of numba's threads, once to
warm up, then `repeats` rounds of one pass per tree in turn (median seconds, median per-round ratio).

Break-even: a build that saves B seconds and traces at q times the SAH tree's r_sah rays/s (q the
median per-round ratio) pays for itself until B r_sah / (1 / q - 1) rays; a render tracing fewer rays is
faster with it. "always" when
it also traces at least as fast, "never" when it builds slower. The machine is shared: the load average
is printed before and after each mesh.
"""
import argparse
import json
import os
import sys
import time

import numpy as np

SPECS = ("bvh:sah", "bvh:median", "bvh:lbvh")
RAY_KINDS = ("camera", "bounce")


def _load() -> str:
    return " ".join(f"{x:.2f}" for x in os.getloadavg())


def _break_even(build_saved: float, speed_ratio: float, mrays_sah: float) -> float | str:
    """Rays after which the SAH tree's faster tracing repays its slower build.

    speed_ratio: this tree's throughput over the SAH tree's, measured back to back, so a ray costs
    (1 / speed_ratio - 1) / r_sah seconds more through it.
    """
    if build_saved <= 0.0:
        return "never"
    extra_per_ray = (1.0 / speed_ratio - 1.0) / (mrays_sah * 1e6)
    return "always" if extra_per_ray <= 0.0 else build_saved / extra_per_ray


def measure(scene_name: str, size: int, repeats: int, resolution: int) -> dict:
    from tracer import build_accel
    from tracer.bench.scenes import bounce_rays, camera_rays, make_scene

    scene = make_scene(scene_name, size)
    out = {"scene": scene_name, "size": size, "triangles": len(scene.faces), "load_before": _load()}
    seconds = {spec: [] for spec in SPECS}
    accels = {}
    for _ in range(repeats):
        for spec in SPECS:
            accels[spec] = None                         # free the previous tree before building again
            accels[spec] = build_accel(scene.vertices, scene.faces, spec, leaf_size=4)
            seconds[spec].append(accels[spec].build_seconds)
    rays = {"camera": camera_rays(scene.camera, resolution, resolution)}
    sah_hits = accels["bvh:sah"].intersect(*rays["camera"])
    rays["bounce"] = bounce_rays(scene.vertices, scene.faces, *rays["camera"], sah_hits.t, sah_hits.triangle,
                                 resolution * resolution)
    trace = {kind: {spec: [] for spec in SPECS} for kind in RAY_KINDS}
    nodes = {kind: {} for kind in RAY_KINDS}
    for kind in RAY_KINDS:
        for spec in SPECS:                              # warm-up pass, and the cost per ray
            hits = accels[spec].intersect(*rays[kind])
            nodes[kind][spec] = (float(hits.nodes.mean()), float(hits.tris.mean()))
        for _ in range(repeats):
            for spec in SPECS:
                start = time.perf_counter()
                accels[spec].intersect(*rays[kind])
                trace[kind][spec].append(time.perf_counter() - start)
    out["load_after"] = _load()
    rows = {}
    for spec in SPECS:
        stats = accels[spec].stats()
        row = {"build_s": float(np.median(seconds[spec])),
               "build_ratio": float(np.median(np.array(seconds[spec]) / np.array(seconds["bvh:sah"]))),
               "sah_cost": stats["sah_cost"], "epo": stats.get("epo"), "depth_max": stats["depth_max"],
               "leaf_size_mean": stats["leaf_size_mean"]}
        for kind in RAY_KINDS:
            n_rays = len(rays[kind][0])
            row[f"{kind}_mrays"] = n_rays / float(np.median(trace[kind][spec])) / 1e6
            per_round = np.array(trace[kind]["bvh:sah"]) / np.array(trace[kind][spec])
            row[f"{kind}_ratio"] = float(np.median(per_round))
            row[f"{kind}_nodes"], row[f"{kind}_tris"] = nodes[kind][spec]
        rows[spec] = row
    for spec in SPECS:
        saved = rows["bvh:sah"]["build_s"] - rows[spec]["build_s"]
        for kind in RAY_KINDS:
            rows[spec][f"{kind}_break_even"] = (None if spec == "bvh:sah" else
                                                _break_even(saved, rows[spec][f"{kind}_ratio"],
                                                            rows["bvh:sah"][f"{kind}_mrays"]))
    out["builds"] = rows
    return out


def _fmt(value) -> str:
    if value is None:
        return "-"
    if isinstance(value, str):
        return value
    if abs(value) >= 1e5:
        return f"{value:.2e}"
    return f"{value:.3g}"


def report(result: dict) -> str:
    lines = [f"{result['scene']} {result['triangles']:,} triangles   load {result['load_before']} -> "
             f"{result['load_after']}",
             f"{'build':<11}{'build s':>8}{'x sah':>7}{'SAH cost':>10}{'EPO':>8}{'depth':>6}"
             f"{'cam Mr/s':>9}{'x sah':>7}{'nodes':>7}{'bnc Mr/s':>9}{'x sah':>7}{'nodes':>7}"
             f"{'even cam':>10}{'even bnc':>10}"]
    for spec, row in result["builds"].items():
        lines.append(f"{spec:<11}{_fmt(row['build_s']):>8}{_fmt(row['build_ratio']):>7}"
                     f"{_fmt(row['sah_cost']):>10}{_fmt(row['epo']):>8}{row['depth_max']:>6}"
                     f"{_fmt(row['camera_mrays']):>9}{_fmt(row['camera_ratio']):>7}{_fmt(row['camera_nodes']):>7}"
                     f"{_fmt(row['bounce_mrays']):>9}{_fmt(row['bounce_ratio']):>7}{_fmt(row['bounce_nodes']):>7}"
                     f"{_fmt(row['camera_break_even']):>10}{_fmt(row['bounce_break_even']):>10}")
    return "\n".join(lines)


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--scenes", nargs="+", default=["sphere", "terrain"])
    parser.add_argument("--sizes", nargs="+", type=int, default=[1_000_000, 5_000_000])
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--resolution", type=int, default=512, help="camera rays: resolution^2")
    parser.add_argument("--json", help="also write the figures to this file")
    args = parser.parse_args(argv)
    sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), ".."))
    from tracer import build_accel
    from tracer.bench.scenes import make_scene

    warm = make_scene("sphere", 1000)                  # compile or load every kernel outside the timings
    for spec in SPECS:
        build_accel(warm.vertices, warm.faces, spec).intersect(np.zeros((1, 3)), np.ones((1, 3)))
    results = []
    for size in args.sizes:
        for scene_name in args.scenes:
            results.append(measure(scene_name, size, args.repeats, args.resolution))
            print(report(results[-1]), "\n", flush=True)
    print("x sah: median over rounds of (SAH seconds / this build's seconds) for tracing, of (this / SAH)\n"
          "for building; even: rays after which the SAH build's faster tracing repays its slower build.")
    if args.json:
        with open(args.json, "w") as handle:
            json.dump(results, handle, indent=1)
    return 0


if __name__ == "__main__":
    sys.exit(main())

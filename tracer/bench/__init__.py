"""`tracer bench`: build time, ray throughput and traversal cost of every structure on generated scenes.

For each scene (`tracer.bench.scenes`) and triangle count, every structure of `STRUCTURES` is built
once (build seconds as measured by `build_accel`) and traces two sets of rays of equal size: camera rays
(coherent: one per pixel of a pinhole camera) and diffuse-bounce rays (incoherent: cosine-distributed
about the first hits). Each set is traced once to warm up (and to count nodes visited and triangles
tested per ray), then `repeats` more times under `time.perf_counter`; throughput is rays over the median
of those passes, on all of numba's threads.

`brute` tests every triangle for every ray, so its cost per ray hardly depends on the ray: it traces an
evenly strided subset of each ray set, at most `brute_budget` ray-triangle tests, in a single timed pass
(the kernel is already warm and the pass is long), and is skipped ("-") when that subset would be under
`MIN_BRUTE_RAYS` rays. Speed-up over brute is the ratio of per-ray throughputs, measured wherever brute
ran.

A structure that cannot be built (a `UserError`, e.g. not implemented yet) is reported as unavailable.
The scaling summary lists mean nodes per camera ray against triangle count N beside the growth of
log2 N, and the least-squares slope of nodes per ray against log2 N (nodes added per doubling of N):
logarithmic growth shows as a ratio no larger than that of log2 N and a steady slope. The soup is the
exception by design: its triangles fill a volume at a fixed total area, so a ray crosses about N^(1/3)
small leaves before its first hit, whatever the structure (see `tracer.bench.scenes`).
"""
import glob
import math
import os
import platform
import sys
import time
from itertools import pairwise
from pathlib import Path
from typing import NamedTuple

import numba
import numpy as np
from tqdm import tqdm

from tracer.accel import _traverse, build_accel, parse_spec
from tracer.bench.scenes import SCENES, bounce_rays, camera_rays, make_scene
from tracer.errors import UserError
from tracer.io.stats_json import write_json

STRUCTURES = ("bvh", "bvh:median", "bvh:lbvh", "kdtree", "kdtree:median", "brute")
RAY_KINDS = ("camera", "bounce")
MIN_BRUTE_RAYS = 500      # about two chunks of the traversal kernel: both threads busy
LEAF_SIZE = 4
BOUNCE_SEED = 7


class Suite(NamedTuple):
    name: str
    scenes: tuple[str, ...]
    sizes: tuple[int, ...]      # nominal triangle counts
    resolution: int             # camera rays: resolution x resolution; as many bounce rays
    repeats: int                # timed passes after the warm-up pass
    brute_budget: float         # most ray-triangle tests brute may do per pass


QUICK = Suite("quick", ("sphere", "soup"), (10_000, 100_000), 256, 3, 5e7)
FULL = Suite("full", tuple(SCENES), (10_000, 100_000, 1_000_000), 512, 3, 5e8)


def size_label(n: int) -> str:
    """10000 -> "10k", 1000000 -> "1M" (nominal sizes)."""
    for unit, scale in (("M", 1_000_000), ("k", 1_000)):
        if n >= scale and n % scale == 0:
            return f"{n // scale}{unit}"
    return str(n)


def _kernels_cached() -> bool:
    folder = os.path.join(os.path.dirname(_traverse.__file__), "__pycache__")
    return bool(glob.glob(os.path.join(folder, "_traverse.intersect_rays-*.nbi")))


def _warm_up(structures) -> None:
    """Compile or load every builder and the traversal kernel outside the timed region."""
    if not _kernels_cached():
        print("compiling kernels… (first run only)", file=sys.stderr, flush=True)
    scene = make_scene("soup", 64)
    origins, directions = camera_rays(scene.camera, 8, 8)
    for spec in structures:
        try:
            accel = build_accel(scene.vertices, scene.faces, spec, leaf_size=LEAF_SIZE)
        except UserError:
            continue
        accel.intersect(origins, directions)


def _strided(n_rays: int, n_triangles: int, budget: float) -> np.ndarray | None:
    """Indices of the evenly spread ray subset brute may trace, or None when under MIN_BRUTE_RAYS."""
    affordable = min(n_rays, int(budget // max(n_triangles, 1)))
    if affordable < min(MIN_BRUTE_RAYS, n_rays):
        return None
    return np.linspace(0, n_rays - 1, affordable).round().astype(np.int64)


def _cost_summary(values: np.ndarray) -> dict:
    values = np.asarray(values, np.float64)
    if values.size == 0:
        return {"mean": 0.0, "p50": 0.0, "p95": 0.0, "max": 0.0}
    return {"mean": float(values.mean()), "p50": float(np.percentile(values, 50)),
            "p95": float(np.percentile(values, 95)), "max": float(values.max())}


def _trace(accel, origins, directions, repeats: int, warm_up: bool = True) -> tuple[dict, object]:
    """Time `repeats` passes (after an untimed warm-up pass when `warm_up`); returns (figures, hits).

    The hits (and with them the per-ray cost counts) are those of the first pass.
    """
    hits = accel.intersect(origins, directions) if warm_up else None
    seconds = []
    for _ in range(max(1, repeats)):
        start = time.perf_counter()
        timed_hits = accel.intersect(origins, directions)
        seconds.append(time.perf_counter() - start)
        hits = hits if hits is not None else timed_hits
    n = len(origins)
    median, best = float(np.median(seconds)), float(min(seconds))
    figures = {"rays": n, "seconds": seconds, "seconds_median": median,
               "mrays_per_s": n / median / 1e6 if median > 0 else math.inf,
               "mrays_per_s_best": n / best / 1e6 if best > 0 else math.inf,
               "hit_fraction": float(np.mean(hits.triangle >= 0)) if n else 0.0,
               "nodes_per_ray": _cost_summary(hits.nodes), "tris_per_ray": _cost_summary(hits.tris)}
    return figures, hits


def _agreement(hits, reference, subset) -> float:
    """Fraction of rays whose hit distance matches the reference structure's (both miss, or within 1e-4)."""
    ref_t = reference.t if subset is None else reference.t[subset]
    both_miss = np.isinf(hits.t) & np.isinf(ref_t)
    with np.errstate(invalid="ignore"):         # inf - inf where both miss: decided by both_miss
        same = both_miss | (np.abs(hits.t - ref_t) <= 1e-4 * np.maximum(1.0, ref_t))
    return float(np.mean(same)) if len(same) else 1.0


def _bench_structure(spec, scene, rays, suite, reference) -> tuple[dict, dict]:
    """Build and time one structure on one scene; returns (result row, {ray kind: hits})."""
    row = {"scene": scene.name, "triangles": int(len(scene.faces)), "structure": spec, "available": True}
    try:
        accel = build_accel(scene.vertices, scene.faces, spec, leaf_size=LEAF_SIZE)
    except UserError as error:
        row.update(available=False, reason=str(error))
        return row, {}
    row["build_seconds"] = accel.build_seconds
    try:
        row["build"] = accel.stats()
    except (UserError, NotImplementedError) as error:
        row["build"] = {}
        row["stats_unavailable"] = str(error) or type(error).__name__
    row["memory_bytes"] = row["build"].get("memory_bytes")
    row["bytes_per_triangle"] = row["build"].get("bytes_per_triangle")
    row["sah_cost"] = row["build"].get("sah_cost")
    subset = None
    if accel.kind == "brute":
        subset = _strided(len(rays["camera"][0]), len(scene.faces), suite.brute_budget)
        if subset is None:
            row["skipped"] = (f"over budget: {len(scene.faces):,} triangles x {MIN_BRUTE_RAYS} rays > "
                              f"{suite.brute_budget:.0e} tests")
            return row, {}
    all_hits = {}
    for kind in RAY_KINDS:
        origins, directions = rays[kind]
        if len(origins) == 0:       # no bounce rays when no camera ray hit anything
            continue
        if subset is not None:
            origins, directions = origins[subset], directions[subset]
        if subset is None:
            figures, hits = _trace(accel, origins, directions, suite.repeats)
        else:   # one long pass: the kernel is warm and the timer's resolution does not matter
            figures, hits = _trace(accel, origins, directions, 1, warm_up=False)
        if kind in reference:
            figures["agreement_with_reference"] = _agreement(hits, reference[kind], subset)
        row[kind] = figures
        all_hits[kind] = hits
        if kind == "camera" and "bounce" not in rays:
            rays["bounce"] = _bounce_from(scene, origins, directions, hits, len(rays["camera"][0]))
    return row, all_hits


def _bounce_from(scene, origins, directions, hits, count):
    return bounce_rays(scene.vertices, scene.faces, origins, directions, hits.t, hits.triangle, count,
                       seed=BOUNCE_SEED)


def _speedups(rows: list[dict]) -> None:
    """Per-ray speed-up over brute of each row of one scene and size, where brute ran."""
    brute = next((r for r in rows if r["structure"] == "brute" and "camera" in r), None)
    for row in rows:
        for kind in RAY_KINDS:
            if brute is None or kind not in row or kind not in brute:
                row[f"speedup_{kind}"] = None
            else:
                row[f"speedup_{kind}"] = row[kind]["mrays_per_s"] / brute[kind]["mrays_per_s"]


def _scaling(results: list[dict], suite: Suite) -> dict:
    """Mean nodes per camera ray against triangle count, per scene and structure."""
    out = {}
    for scene in suite.scenes:
        out[scene] = {}
        for spec in STRUCTURES:
            if spec == "brute":
                continue
            rows = [r for r in results if r["scene"] == scene and r["structure"] == spec and "camera" in r]
            if not rows:
                continue
            tris = np.array([r["triangles"] for r in rows], np.float64)
            nodes = np.array([r["camera"]["nodes_per_ray"]["mean"] for r in rows])
            entry = {"sizes": [r["size"] for r in rows], "triangles": tris.astype(int).tolist(),
                     "camera_nodes_per_ray": nodes.tolist()}
            if len(rows) >= 2:
                log_n = np.log2(tris)
                entry["growth"] = float(nodes[-1] / nodes[0]) if nodes[0] > 0 else None
                entry["log2_growth"] = float(log_n[-1] / log_n[0])
                entry["nodes_per_doubling"] = float(np.polyfit(log_n, nodes, 1)[0])
                # Nodes added per doubling of N between successive sizes: constant (or falling) when the
                # cost grows like a + b log N, rising when it grows faster.
                entry["nodes_per_doubling_steps"] = (np.diff(nodes) / np.diff(log_n)).tolist()
            out[scene][spec] = entry
    return out


def _fmt(value, digits: int = 3) -> str:
    """A number to `digits` significant figures (no exponent for everyday sizes); None -> "-"."""
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "-"
    value = float(value)
    if value == 0.0:
        return "0"
    decimals = max(0, digits - 1 - int(math.floor(math.log10(abs(value)))))
    return f"{value:,.{decimals}f}"


def _render_table(headers: list[str], body: list[list[str]], text_columns: int) -> str:
    """Columns two spaces apart; the first `text_columns` left-aligned, the numbers right-aligned."""
    widths = [max(len(h), *(len(r[i]) for r in body)) if body else len(h) for i, h in enumerate(headers)]

    def line(cells):
        return "  ".join(c.ljust(w) if i < text_columns else c.rjust(w)
                         for i, (c, w) in enumerate(zip(cells, widths, strict=True))).rstrip()

    rule = "  ".join("-" * w for w in widths)
    return "\n".join([line(headers), rule, *(line(r) for r in body)])


def results_table(results: list[dict]) -> str:
    """The per-structure table (one row per scene, size and structure), aligned columns."""
    headers = ["scene", "size", "structure", "triangles", "build s", "cam Mr/s", "bnc Mr/s",
               "cam nodes", "cam tris", "bnc nodes", "bnc tris", "B/tri", "SAH", "x brute cam",
               "x brute bnc"]
    body, notes, subsets = [], [], []
    for r in results:
        head = [r["scene"], r["size"], r["structure"], f"{r['triangles']:,}"]
        if not r["available"]:
            body.append(head + ["unavailable"] + ["-"] * (len(headers) - 5))
            note = f"{r['structure']}: unavailable ({r['reason']})"
            if note not in notes:
                notes.append(note)
            continue
        cam, bnc = r.get("camera", {}), r.get("bounce", {})
        body.append(head + [
            _fmt(r["build_seconds"]), _fmt(cam.get("mrays_per_s")), _fmt(bnc.get("mrays_per_s")),
            _fmt(cam.get("nodes_per_ray", {}).get("mean")), _fmt(cam.get("tris_per_ray", {}).get("mean")),
            _fmt(bnc.get("nodes_per_ray", {}).get("mean")), _fmt(bnc.get("tris_per_ray", {}).get("mean")),
            _fmt(r.get("bytes_per_triangle")), _fmt(r.get("sah_cost")),
            _fmt(r.get("speedup_camera")), _fmt(r.get("speedup_bounce"))])
        if "skipped" in r:
            notes.append(f"{r['scene']} {r['size']} {r['structure']}: skipped, {r['skipped']}")
        elif r["structure"] == "brute" and cam and cam["rays"] < r.get("rays_total", cam["rays"]):
            subsets.append(f"{r['scene']} {r['size']} {cam['rays']:,} of {r['rays_total']:,}")
    text = _render_table(headers, body, text_columns=3)
    if subsets:
        notes.append("brute traced an evenly strided subset of each ray set, timed in one pass (it tests "
                     "every triangle on every ray): " + ", ".join(subsets))
    if notes:
        text += "\n" + "\n".join(notes)
    return text


def scaling_table(scaling: dict, labels: list[str]) -> str:
    """Mean nodes per camera ray at each size, per scene and structure, with growth against log2 N."""
    steps = [f"{a}->{b}" for a, b in pairwise(labels)]
    headers = ["scene", "structure", *(f"nodes @{s}" for s in labels), "growth", "log2 N growth",
               "nodes/doubling", *(f"per doubling {s}" for s in steps)]
    body = []
    for scene, specs in scaling.items():
        for spec, e in specs.items():
            by_size = dict(zip(e["sizes"], e["camera_nodes_per_ray"], strict=True))
            per_step = dict(zip((f"{a}->{b}" for a, b in pairwise(e["sizes"])),
                                e.get("nodes_per_doubling_steps", []), strict=False))
            body.append([scene, spec, *(_fmt(by_size.get(s)) for s in labels), _fmt(e.get("growth")),
                         _fmt(e.get("log2_growth")), _fmt(e.get("nodes_per_doubling")),
                         *(_fmt(per_step.get(s)) for s in steps)])
    text = _render_table(headers, body, text_columns=2)
    text += ("\nlogarithmic growth (a + b log2 N) adds the same nodes per doubling of N at every size; "
             "'growth' against\n'log2 N growth' assumes a = 0")
    if "soup" in scaling:
        text += ("\nsoup: triangles fill a volume at a fixed total area, so a ray crosses about N^(1/3) "
                 "leaves before its first hit\n(x2.15 per tenfold N) on top of the log2 N descent, "
                 "whatever the structure")
    return text


def run_bench(quick: bool, json_path: str | None, *, sizes=None, scenes=None, resolution: int | None = None,
              repeats: int | None = None, structures=STRUCTURES, progress: bool = True) -> int:
    """Run the quick or full suite, print the tables, write `json_path` if given; returns the exit status.

    `sizes`, `scenes`, `resolution`, `repeats` and `structures` override the suite's (for tests and
    experiments).
    """
    suite = QUICK if quick else FULL
    suite = suite._replace(
        scenes=tuple(scenes) if scenes is not None else suite.scenes,
        sizes=tuple(int(n) for n in sizes) if sizes is not None else suite.sizes,
        resolution=int(resolution) if resolution is not None else suite.resolution,
        repeats=int(repeats) if repeats is not None else suite.repeats)
    for spec in structures:
        parse_spec(spec)
    for name in suite.scenes:
        if name not in SCENES:
            raise UserError(f"bench: unknown scene {name!r} (choose from {', '.join(SCENES)})")
    if json_path is not None and not Path(json_path).resolve().parent.is_dir():
        raise UserError(f"--json {json_path}: the folder does not exist")

    _warm_up(structures)
    results = []
    bar = tqdm(total=len(suite.scenes) * len(suite.sizes) * len(structures), disable=not progress,
               unit="build", file=sys.stderr, leave=False, dynamic_ncols=True)
    started = time.perf_counter()
    try:
        for name in suite.scenes:
            for n in suite.sizes:
                bar.set_description(f"{name} {size_label(n)}: generating")
                scene = make_scene(name, n)
                rays = {"camera": camera_rays(scene.camera, suite.resolution, suite.resolution)}
                reference, group = {}, []
                for spec in structures:
                    bar.set_description(f"{name} {size_label(n)}: {spec}")
                    row, hits = _bench_structure(spec, scene, rays, suite, reference)
                    row["size"] = size_label(n)
                    row["rays_total"] = len(rays["camera"][0])
                    if hits and not reference and spec != "brute":
                        reference.update(hits)
                    group.append(row)
                    bar.update(1)
                _speedups(group)
                results.extend(group)
    finally:
        bar.close()
    seconds = time.perf_counter() - started

    scaling = _scaling(results, suite)
    labels = [size_label(n) for n in suite.sizes]
    print(f"tracer bench ({suite.name}): {suite.resolution}x{suite.resolution} camera rays and as many "
          f"diffuse-bounce rays per scene; {numba.get_num_threads()} threads; median of {suite.repeats} "
          f"timed pass{'es' if suite.repeats != 1 else ''} after a warm-up pass")
    print(results_table(results))
    print()
    print("scaling: mean nodes visited per camera ray")
    print(scaling_table(scaling, labels))
    print(f"\nbench finished in {seconds:.1f} s")
    if json_path is not None:
        data = {"suite": suite.name, "scenes": list(suite.scenes), "sizes": list(suite.sizes),
                "structures": list(structures), "leaf_size": LEAF_SIZE,
                "rays": {"width": suite.resolution, "height": suite.resolution,
                         "camera": suite.resolution ** 2, "bounce": suite.resolution ** 2},
                "repeats": suite.repeats, "brute_budget": suite.brute_budget,
                "min_brute_rays": MIN_BRUTE_RAYS, "threads": numba.get_num_threads(),
                "machine": {"cpu_count": os.cpu_count(), "platform": platform.platform(),
                            "python": platform.python_version(), "numba": numba.__version__,
                            "numpy": np.__version__},
                "seconds": seconds, "results": results, "scaling": scaling}
        print(write_json(json_path, data))
    return 0


__all__ = ["FULL", "QUICK", "STRUCTURES", "Suite", "results_table", "run_bench", "scaling_table"]

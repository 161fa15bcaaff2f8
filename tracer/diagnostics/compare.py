"""`tracer compare` and `tracer inspect`: several structures over one scene, side by side.

compare renders the scene once per SPEC with the same seed and samples, so every structure traces the
same rays with the same random numbers (the random stream is keyed by seed, pixel and sample): the
radiance images agree except where two triangles tie for the closest hit, and any difference in the
cost channels is the structures' own. It writes each SPEC's render outputs, then

    NAME-compare.json            {"scene", "specs", "results": {SPEC: statistics}} (INTERFACE.md)
    NAME-compare-nodes.png       cost.nodes of every SPEC side by side on ONE colour scale
    NAME-compare-tris.png        cost.tris, likewise
    NAME-compare-primary-nodes.png, NAME-compare-primary-tris.png   the camera ray alone, likewise
    NAME-compare-ratio.png       log2(cost.nodes of SPEC 1 / cost.nodes of SPEC 2) per pixel
    NAME-compare.html            the report (tracer.diagnostics.report)

and prints the statistics table and the paths on stdout. inspect builds the structures only and prints
their build statistics (optionally as JSON). Notes and progress go to stderr.
"""
import argparse
import copy
import sys
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import NamedTuple

import numpy as np

from tracer.accel import build_accel, parse_spec, spec_name
from tracer.diagnostics.heatmap import value_range, write_heatmaps
from tracer.errors import UserError
from tracer.io.stats_json import write_json

EXIT_OK, EXIT_INTERRUPTED = 0, 130
# Per-pixel costs below this many nodes per sample are raised to it before the ratio, so a pixel where
# one structure visits no node (brute force has none; a partial render has empty pixels) gets a finite
# ratio; half a node is below every non-zero cost a ray through a tree can have (it visits the root).
RATIO_FLOOR = 0.5
# Radiance of two structures "agrees" at a pixel when no channel differs by more than this (relative to
# max(1, |value|)): float32 keeps ~7 digits, and identical hits give identical bits anyway.
AGREEMENT_TOLERANCE = 1e-5

HEAT_PANELS = {   # output suffix -> (channel, colour-bar label)
    "nodes": ("cost.nodes", "nodes visited per sample (all rays of the path)"),
    "tris": ("cost.tris", "triangles tested per sample (all rays of the path)"),
    "primary-nodes": ("primary.nodes", "nodes visited by the camera ray, per sample"),
    "primary-tris": ("primary.tris", "triangles tested by the camera ray, per sample"),
}


class Column(NamedTuple):
    header: str
    keys: tuple             # path into the statistics dict
    fmt: str                # format spec of the value; missing values show as "-"


# The statistics table of `tracer compare` (one row per SPEC, the statistics JSON of each render).
COMPARE_COLUMNS = (
    Column("build s", ("build", "seconds"), ".3f"),
    Column("nodes", ("build", "nodes"), ","),
    Column("leaves", ("build", "leaves"), ","),
    Column("depth max", ("build", "depth_max"), "d"),
    Column("SAH cost", ("build", "sah_cost"), ".2f"),
    Column("refs/tri", ("build", "references_per_triangle"), ".3f"),
    Column("overlap", ("build", "sibling_overlap"), ".3f"),
    Column("Mrays/s", ("render", "mrays_per_s"), ".3f"),
    Column("nodes/ray mean", ("cost", "nodes_per_ray", "mean"), ".2f"),
    Column("tris/ray mean", ("cost", "tris_per_ray", "mean"), ".2f"),
    Column("nodes/ray p95", ("cost", "nodes_per_ray", "p95"), ".1f"),
    Column("tris/ray p95", ("cost", "tris_per_ray", "p95"), ".1f"),
)

# The table of `tracer inspect` (one row per SPEC, the "build" statistics of each structure).
INSPECT_COLUMNS = (
    Column("build s", ("seconds",), ".3f"),
    Column("nodes", ("nodes",), ","),
    Column("leaves", ("leaves",), ","),
    Column("empty leaves", ("empty_leaves",), ","),
    Column("depth max", ("depth_max",), "d"),
    Column("depth mean", ("depth_mean_leaf",), ".2f"),
    Column("leaf tris mean", ("leaf_size_mean",), ".2f"),
    Column("SAH cost", ("sah_cost",), ".2f"),
    Column("refs/tri", ("references_per_triangle",), ".3f"),
    Column("overlap", ("sibling_overlap",), ".3f"),
    Column("EPO", ("epo",), ".3f"),
    Column("memory", ("memory_bytes",), "bytes"),
)

# Columns of the inspect table that only some kinds have; left out when no structure listed has them.
KIND_SPECIFIC = ("overlap", "EPO")


def _lookup(stats: dict, keys: Sequence[str]):
    for key in keys:
        if not isinstance(stats, dict) or key not in stats:
            return None
        stats = stats[key]
    return stats


def _format_value(value, fmt: str) -> str:
    if value is None or isinstance(value, dict | list):
        return "-"
    if fmt == "bytes":
        for unit in ("B", "KiB", "MiB"):
            if value < 1024 or unit == "MiB":
                return f"{value:.0f} {unit}" if unit == "B" else f"{value:.1f} {unit}"
            value /= 1024.0
    if isinstance(value, float) and not np.isfinite(value):
        return str(value)
    return format(value, fmt)


def stats_table(results: dict,
                columns: Sequence[Column] = COMPARE_COLUMNS) -> tuple[list[str], list[list[str]]]:
    """The statistics table: headers ("SPEC" first) and one row of formatted cells per SPEC of `results`.

    results: SPEC -> statistics dict (the statistics JSON for compare, the "build" dict for inspect).
    Shared by the text table on stdout and the HTML report.
    """
    headers = ["SPEC", *(c.header for c in columns)]
    rows = [[spec, *(_format_value(_lookup(stats, c.keys), c.fmt) for c in columns)]
            for spec, stats in results.items()]
    return headers, rows


def format_table(headers: Sequence[str], rows: Sequence[Sequence[str]]) -> str:
    """Plain-text table: first column left-aligned, the others right-aligned, a rule under the headers."""
    widths = [max(len(str(cell)) for cell in column) for column in zip(headers, *rows, strict=True)]

    def line(cells):
        first = str(cells[0]).ljust(widths[0])
        rest = [str(cell).rjust(width) for cell, width in zip(cells[1:], widths[1:], strict=True)]
        return "  ".join([first, *rest]).rstrip()

    return "\n".join([line(headers), "  ".join("-" * w for w in widths), *(line(row) for row in rows)])


def histogram_table(build_stats: dict) -> tuple[list[str], list[list[str]]]:
    """Leaf-size histogram per SPEC: columns are the size bins ("0", "1", ..., "65+")."""
    bins: list[str] = []
    for stats in build_stats.values():
        for label in stats.get("leaf_size_histogram", {}):
            if label not in bins:
                bins.append(label)
    rows = [[spec, *(f"{stats.get('leaf_size_histogram', {}).get(b, 0):,}" for b in bins)]
            for spec, stats in build_stats.items()]
    return ["SPEC", *bins], rows


def canonical_specs(specs: Sequence[str], at_least: int) -> list[str]:
    """Checked SPECs in their short form ("bvh:sah" -> "bvh"); unknown, repeated or too few: UserError."""
    names: list[str] = []
    for spec in specs:
        name = spec_name(*parse_spec(spec))
        if name in names:
            raise UserError(f"--accel {spec}: listed twice (as {name}); give each structure once")
        names.append(name)
    if len(names) < at_least:
        raise UserError(f"--accel {' '.join(specs)}: compare needs at least {at_least} structures, "
                        f"e.g. --accel bvh bvh:median")
    return names


def log2_cost_ratio(cost_a: np.ndarray, cost_b: np.ndarray, floor: float = RATIO_FLOOR) -> np.ndarray:
    """Per-pixel log2(cost_a / cost_b) of two (H, W) cost images, each floored at `floor` first.

    0 where the costs are equal (both 0 included), +1 where A costs twice as much as B, -1 half as much.
    The floor keeps a zero cost (brute force visits no node) finite: values below `floor` count as
    `floor`, which the ratio map's label states.
    """
    a = np.asarray(cost_a, np.float64)
    b = np.asarray(cost_b, np.float64)
    if a.shape != b.shape or a.ndim != 2:
        raise ValueError(f"cost images must be (H, W) of one shape, got {a.shape} and {b.shape}")
    if not floor > 0.0:
        raise ValueError(f"floor must be positive, got {floor}")
    return np.log2(np.maximum(a, floor) / np.maximum(b, floor))


def write_shared_heatmaps(path, panels: list[tuple[str, np.ndarray]], label: str, log: bool = False) -> Path:
    """Write the panels side by side on ONE colour scale: the range of all of them together."""
    low, high = value_range([image for _, image in panels], log)
    return Path(write_heatmaps(str(path), panels, label, low, high, log=log))


def radiance_agreement(reference: np.ndarray, other: np.ndarray,
                       tolerance: float = AGREEMENT_TOLERANCE) -> dict:
    """How far two (H, W, 3) radiance images differ: the largest difference and the share of pixels
    where some channel differs by more than `tolerance` * max(1, |reference|)."""
    ref = np.asarray(reference, np.float64)
    oth = np.asarray(other, np.float64)
    if ref.shape != oth.shape:
        raise ValueError(f"images differ in shape: {ref.shape} and {oth.shape}")
    diff = np.abs(ref - oth)
    diff = np.where(np.isnan(diff), np.where(np.isnan(ref) & np.isnan(oth), 0.0, np.inf), diff)
    differing = np.any(diff > tolerance * np.maximum(1.0, np.abs(ref)), axis=-1)
    return {"max_abs_difference": float(diff.max()) if diff.size else 0.0,
            "differing_pixel_fraction": float(differing.mean()) if differing.size else 0.0,
            "differing_pixels": int(differing.sum()), "tolerance": tolerance}


def _ratio_summary(ratio: np.ndarray, spec_a: str, spec_b: str) -> dict:
    finite = ratio[np.isfinite(ratio)]
    n = max(finite.size, 1)
    return {"a": spec_a, "b": spec_b, "channel": "cost.nodes", "floor": RATIO_FLOOR,
            "mean_log2": float(finite.mean()) if finite.size else 0.0,
            "median_log2": float(np.median(finite)) if finite.size else 0.0,
            "fraction_a_cheaper": float(np.count_nonzero(finite < 0) / n),
            "fraction_b_cheaper": float(np.count_nonzero(finite > 0) / n),
            "fraction_equal": float(np.count_nonzero(finite == 0) / n)}


def _note(text: str) -> None:
    print(text, file=sys.stderr, flush=True)


def write_compare_outputs(out_dir, scene, specs_requested: list[str], renders: dict, log_heatmap: bool,
                          interrupted: bool) -> tuple[list[Path], str]:
    """Write the compare heat maps, ratio map, JSON and report for the finished `renders`.

    renders: SPEC -> RenderResult, in the order rendered. Returns (paths written, the text table).
    """
    from tracer.diagnostics.report import write_report
    from tracer.render.outputs import output_stem

    specs = list(renders)
    stem = Path(out_dir) / f"{scene.name}-compare"
    results = {spec: renders[spec].stats for spec in specs}
    headers, rows = stats_table(results)
    table = format_table(headers, rows)
    paths: list[Path] = []
    heat_paths: dict[str, Path] = {}
    for suffix, (channel, label) in HEAT_PANELS.items():
        panels = [(spec, renders[spec].channels[channel]) for spec in specs]
        heat_paths[suffix] = write_shared_heatmaps(f"{stem}-{suffix}.png", panels, label, log=log_heatmap)
        paths.append(heat_paths[suffix])
    ratio_summary = None
    ratio_path = None
    if len(specs) >= 2:
        spec_a, spec_b = specs[0], specs[1]
        ratio = log2_cost_ratio(renders[spec_a].channels["cost.nodes"],
                                renders[spec_b].channels["cost.nodes"])
        ratio_label = (f"log2 cost.nodes {spec_a} / {spec_b} (> 0: {spec_a} visits more)\n"
                       f"costs below {RATIO_FLOOR:g} node counted as {RATIO_FLOOR:g}")
        ratio_path = Path(write_heatmaps(f"{stem}-ratio.png", [(f"{spec_a} / {spec_b}", ratio)], ratio_label,
                                         diverging=True))
        paths.append(ratio_path)
        ratio_summary = _ratio_summary(ratio, spec_a, spec_b)
    reference = specs[0]
    agreement = {"reference": reference, "results": {}}
    reference_samples = renders[reference].stats["render"]["samples"]
    for spec in specs[1:]:
        if renders[spec].stats["render"]["samples"] == reference_samples:   # an interrupted one may not
            agreement["results"][spec] = radiance_agreement(renders[reference].radiance,
                                                            renders[spec].radiance)
    document = {"scene": scene.path, "specs": specs, "results": results,
                "specs_requested": list(specs_requested), "interrupted": interrupted,
                "ratio": ratio_summary, "radiance_agreement": agreement}
    json_path = write_json(stem.with_suffix(".json"), document)
    displays = [(spec, output_stem(out_dir, scene.name, spec).with_suffix(".png")) for spec in specs]
    report_path = write_report(stem.with_suffix(".html"), scene_name=scene.name, scene_path=scene.path,
                               results=results, table=(headers, rows), displays=displays,
                               heatmaps=heat_paths, ratio=(ratio_path, ratio_summary), agreement=agreement,
                               interrupted=interrupted)
    return [*paths, json_path, report_path], table


def run_compare(args: argparse.Namespace, render_one: Callable, stop_flag: Callable) -> int:
    """`tracer compare`: render through every SPEC of args.accel, write and print the comparison.

    render_one(scene, spec, args, stop) -> (RenderResult, paths) renders one structure and writes its
    outputs; stop_flag() is a context manager whose value, called, says whether Ctrl-C was pressed.
    Returns 0, or 130 when interrupted (what is finished is written first).
    """
    from tracer.scene import load_scene

    specs = canonical_specs(args.accel, at_least=2)
    scene = load_scene(args.scene)
    for warning in scene.warnings:
        _note(f"warning: {warning}")
    Path(args.out).mkdir(parents=True, exist_ok=True)
    renders: dict = {}
    written: list[Path] = []
    interrupted = False
    run_args = args
    with stop_flag() as stop:
        for index, spec in enumerate(specs):
            if stop():
                interrupted = True
                break
            if not getattr(args, "quiet", False):
                _note(f"compare: {spec} ({index + 1} of {len(specs)})")
            result, paths = render_one(scene, spec, run_args, stop)
            renders[spec] = result
            written.extend(Path(p) for p in paths)
            if result.interrupted:
                interrupted = True
                break
            if run_args is args and getattr(args, "time_limit", None) is not None:
                # The time limit chooses the sample count once; every other SPEC renders exactly as
                # many samples, so the structures are compared on the same rays.
                run_args = copy.copy(args)
                run_args.time_limit = None
                run_args.samples = max(1, result.stats["render"]["samples"])
        # Written under the stop flag: a Ctrl-C now lets the files be finished, then exits with 130.
        table = None
        if renders:
            paths, table = write_compare_outputs(args.out, scene, specs, renders, args.log_heatmap,
                                                 interrupted)
            written.extend(paths)
        interrupted = interrupted or stop()
    if table is not None:
        print(table)
    for path in written:
        print(path)
    if interrupted:
        _note(f"compare: interrupted after {len(renders)} of {len(specs)} structures")
    return EXIT_INTERRUPTED if interrupted else EXIT_OK


def inspect_specs(scene, specs: Sequence[str], leaf_size: int, notes: bool = True) -> dict:
    """Build every SPEC over `scene`; SPEC -> the structure's "build" statistics."""
    results = {}
    for spec in specs:
        kind, build = parse_spec(spec)
        if notes:
            _note(f"inspect: building {spec} over {scene.triangles:,} triangles")
        accel = build_accel(scene.vertices, scene.faces, kind, build, leaf_size=leaf_size)
        results[spec] = accel.stats()
    return results


def inspect_report(scene, results: dict) -> str:
    """The human-readable text of `tracer inspect`: statistics table and leaf-size histogram."""
    columns = [c for c in INSPECT_COLUMNS if c.header not in KIND_SPECIFIC
               or any(_lookup(stats, c.keys) is not None for stats in results.values())]
    headers, rows = stats_table(results, columns)
    hist_headers, hist_rows = histogram_table(results)
    lines = [f"scene {scene.path}: {scene.triangles:,} triangles", "", format_table(headers, rows), "",
             "leaves by the number of triangles they hold:", format_table(hist_headers, hist_rows)]
    constants = next((s["sah_constants"] for s in results.values() if "sah_constants" in s), None)
    notes = ["overlap: BVH sibling boxes' intersection area / parent area, mean over inner nodes",
             "refs/tri: leaf references per triangle (a kd-tree stores straddling triangles in each cell)"]
    if constants:
        notes.insert(0, f"SAH cost: MacDonald & Booth 1990 with C_traverse = {constants['traverse']:g}, "
                        f"C_intersect = {constants['intersect']:g}")
    return "\n".join([*lines, "", *notes])


def run_inspect(args: argparse.Namespace) -> int:
    """`tracer inspect`: build the structures of args.accel, print (and with --json save) their statistics."""
    from tracer.scene import load_scene

    specs = canonical_specs(args.accel, at_least=1)
    scene = load_scene(args.scene)
    for warning in scene.warnings:
        _note(f"warning: {warning}")
    results = inspect_specs(scene, specs, args.leaf_size)
    print(inspect_report(scene, results))
    if args.json:
        path = Path(args.json)
        path.parent.mkdir(parents=True, exist_ok=True)
        print(write_json(path, {"scene": scene.path, "specs": specs, "results": results}))
    return EXIT_OK

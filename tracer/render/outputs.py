"""Everything `tracer render` writes for one structure: EXR, display PNG, cost heat maps, statistics.

NAME is the scene file's stem, TAG the structure SPEC with ":" replaced by "-" (INTERFACE.md).
"""
from pathlib import Path

import numpy as np

from tracer.diagnostics.heatmap import write_heatmaps
from tracer.io.atomic import atomic_open
from tracer.io.exr import write_exr
from tracer.io.png import write_png
from tracer.io.stats_json import write_json
from tracer.render.driver import Checkpoint, RenderResult
from tracer.tonemap import display_image

HEAT_MAPS = {  # file suffix: (EXR channel, colour-bar label)
    "nodes": ("cost.nodes", "nodes visited per sample (all rays of the path)"),
    "tris": ("cost.tris", "triangles tested per sample (all rays of the path)"),
    "primary-nodes": ("primary.nodes", "nodes visited per sample (camera ray only)"),
    "primary-tris": ("primary.tris", "triangles tested per sample (camera ray only)"),
}


def output_stem(out_dir, scene_name: str, spec: str) -> Path:
    return Path(out_dir) / f"{scene_name}-{spec.replace(':', '-')}"


def checkpoint_path(stem: Path) -> Path:
    return stem.with_name(stem.name + ".checkpoint.npz")


def write_checkpoint(stem: Path, checkpoint: Checkpoint, fingerprint: str) -> Path:
    """Save the sums of the whole passes done, for `--resume` (atomically)."""
    path = checkpoint_path(stem)
    with atomic_open(path, "wb") as handle:  # a handle: given a file name, np.savez would append ".npz"
        np.savez(handle, sums=checkpoint.sums, samples_done=checkpoint.samples_done, hist=checkpoint.hist,
                 counters=checkpoint.counters, fingerprint=fingerprint)
    return path


def write_render_outputs(result: RenderResult, out_dir, scene_name: str, spec: str,
                         log_heatmap: bool = False) -> list[Path]:
    """Write NAME-TAG.exr, .png, -nodes.png, -tris.png, -primary-nodes.png, -primary-tris.png and .json
    into out_dir; return the paths."""
    stem = output_stem(out_dir, scene_name, spec)
    stem.parent.mkdir(parents=True, exist_ok=True)
    stats = result.stats
    header = {"tracer_samples": int(result.checkpoint.samples_done), "tracer_accel": spec,
              "tracer_scene": str(stats["scene"])}
    exr = write_exr(stem.with_suffix(".exr"), result.channels, header)
    png = write_png(stem.with_suffix(".png"), display_image(result.radiance))
    heat = []
    for suffix, (channel, label) in HEAT_MAPS.items():
        heat.append(Path(write_heatmaps(f"{stem}-{suffix}.png", [(f"{scene_name} | {spec}",
                                        result.channels[channel])], label, log=log_heatmap)))
    js = write_json(stem.with_suffix(".json"), stats)
    return [exr, png, *heat, js]

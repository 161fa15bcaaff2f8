"""Render a scene: build (or take) a structure, run sample passes over bands of rows, gather statistics.

A pass traces one sample of every pixel into a pass buffer, which is added to the running sums only
when the whole pass is done: an interrupted pass is dropped, so the sums always hold whole passes and a
render resumed from them is the render that was never interrupted.
"""
import sys
import time
from collections.abc import Callable
from typing import NamedTuple

import numba
import numpy as np
from tqdm import tqdm

from tracer import _kernel_cache
from tracer.accel import Accel, build_accel, parse_spec
from tracer.render import _integrator as kern
from tracer.render.camera import camera_params
from tracer.render.geometry import kernel_scene
from tracer.render.rng import seed_key
from tracer.resources import check_fits
from tracer.scene.types import RenderSettings, Scene

PATHS_PER_CALL = 32768          # pixels per kernel call: short enough to stop promptly, long enough to scale
CHANNEL_NAMES = ("R", "G", "B", "cost.nodes", "cost.tris", "primary.nodes", "primary.tris",
                 "albedo.R", "albedo.G", "albedo.B", "normal.X", "normal.Y", "normal.Z", "depth.Z")


class Checkpoint(NamedTuple):
    """Everything a render needs to go on: sums of whole passes and the per-ray cost tallies."""
    sums: np.ndarray            # (H, W, N_CHANNELS) float64 sums over the samples done
    samples_done: int
    hist: np.ndarray            # (2, HIST_BINS) int64 per-ray histograms of nodes and triangles
    counters: np.ndarray        # (N_COUNTERS,) int64 ray counts and maxima


class RenderResult(NamedTuple):
    radiance: np.ndarray        # (H, W, 3) float32 mean radiance, row 0 at the top
    channels: dict              # EXR channel name -> (H, W) float32 (R, G, B and every auxiliary one)
    stats: dict                 # the statistics JSON (INTERFACE.md)
    checkpoint: Checkpoint      # to resume from
    interrupted: bool


def _percentiles(hist: np.ndarray, maximum: int, total: int) -> dict:
    """p50 and p95 of a per-ray cost histogram (exact below HIST_EXACT, else within one 2.2% bin)."""
    cum = np.cumsum(hist)
    out = {}
    for name, q in (("p50", 0.50), ("p95", 0.95)):
        if total == 0:
            out[name] = 0.0
            continue
        b = int(np.searchsorted(cum, q * total, side="left"))
        if b < kern.HIST_EXACT:
            out[name] = float(b)
        else:
            upper = kern.HIST_EXACT * 2.0 ** ((b + 1 - kern.HIST_EXACT) / kern.HIST_PER_OCTAVE)
            out[name] = float(min(upper, maximum))
    return out


def resolve_settings(scene: Scene, **overrides) -> RenderSettings:
    """The scene's [render] settings with the non-None overrides applied."""
    return scene.settings._replace(**{k: v for k, v in overrides.items() if v is not None})


def render(scene: Scene, accel: str | Accel = "bvh", samples: int | None = None, width: int | None = None,
           height: int | None = None, bounces: int | None = None, seed: int | None = None,
           threads: int | None = None, leaf_size: int = 4, progress: bool = False,
           should_stop: Callable[[], bool] | None = None, resume: Checkpoint | None = None,
           time_limit: float | None = None, clamp: float | None = None) -> RenderResult:
    """Path-trace `scene` through the structure `accel` (a SPEC such as "bvh:median", or a built Accel).

    Arguments left None take the scene's [render] values. `should_stop` is polled between kernel calls
    (Ctrl-C); `resume` (a Checkpoint) continues an earlier render; `time_limit` (seconds) stops
    after the last whole pass that fits; `clamp` caps each indirect contribution's largest channel
    (biased; off by default).
    """
    settings = resolve_settings(scene, samples=samples, width=width, height=height, bounces=bounces,
                                seed=seed)
    check_fits(scene.path, accel.kind if isinstance(accel, Accel) else ":".join(parse_spec(accel)),
               0 if isinstance(accel, Accel) else scene.triangles, settings.width, settings.height)
    if not isinstance(accel, Accel):
        kind, build = parse_spec(accel)
        accel = build_accel(scene.vertices, scene.faces, kind=kind, build=build, leaf_size=leaf_size)
    w, h = settings.width, settings.height
    geo = kernel_scene(scene)
    cam = camera_params(scene.camera, w, h)
    key = seed_key(settings.seed)
    max_threads = numba.config.NUMBA_NUM_THREADS
    threads_used = max(1, min(int(threads or max_threads), max_threads))
    previous_threads = numba.get_num_threads()
    numba.set_num_threads(threads_used)
    hist = np.zeros((max_threads, 2, kern.HIST_BINS), np.int64)
    counters = np.zeros((max_threads, kern.N_COUNTERS), np.int64)
    if resume is not None:
        sums, done = np.array(resume.sums, np.float64), int(resume.samples_done)
        if sums.shape != (h, w, kern.N_CHANNELS):
            raise ValueError(f"checkpoint holds a {sums.shape[1]}x{sums.shape[0]} image, not {w}x{h}")
        hist[0] = resume.hist
        counters[0] = resume.counters
    else:
        sums, done = np.zeros((h, w, kern.N_CHANNELS)), 0
    hist_done, counters_done = hist.copy(), counters.copy()     # tallies of whole passes only
    pass_buf = np.zeros((h, w, kern.N_CHANNELS), np.float32)
    band = max(1, min(h, PATHS_PER_CALL // max(w, 1)))
    if progress and not _kernel_cache.is_warm():
        print("compiling kernels… (first run only)", file=sys.stderr, flush=True)
    # Warm-up on one pixel: compiles or loads the kernels outside the timed loop.
    clamp = float(clamp or 0.0)
    kern.render_rows(accel.tree, geo, cam, w, h, 0, 1, key, 0, 0, clamp, np.zeros((1, w, kern.N_CHANNELS),
                     np.float32), hist.copy(), counters.copy())
    interrupted = False
    start = time.perf_counter()
    bar = tqdm(total=(settings.samples - done) * h, disable=not progress, unit="row", file=sys.stderr,
               desc=f"{accel.spec} {w}x{h}", leave=False, dynamic_ncols=True, mininterval=0.5)
    try:
        for sample in range(done, settings.samples):
            for row0 in range(0, h, band):
                if should_stop is not None and should_stop():
                    interrupted = True
                    break
                row1 = min(h, row0 + band)
                kern.render_rows(accel.tree, geo, cam, w, h, row0, row1, key, sample, settings.bounces,
                                 clamp, pass_buf, hist, counters)
                bar.update(row1 - row0)
                rate = counters[:, kern.K_RAYS].sum() / max(time.perf_counter() - start, 1e-9) / 1e6
                bar.set_postfix_str(f"sample {sample + 1}/{settings.samples}, {rate:.2f} Mrays/s")
            if interrupted:
                break
            sums += pass_buf
            done = sample + 1
            hist_done[:], counters_done[:] = hist, counters
            if time_limit is not None and time.perf_counter() - start >= time_limit:
                break
    finally:
        bar.close()
        numba.set_num_threads(previous_threads)
    seconds = time.perf_counter() - start
    mean = sums / max(done, 1)
    channels = {name: np.ascontiguousarray(mean[:, :, i], np.float32) for i, name in enumerate(CHANNEL_NAMES)}
    if done == 0:
        channels["depth.Z"][:] = np.inf
    radiance = np.ascontiguousarray(mean[:, :, 0:3], np.float32)
    total = counters_done.sum(axis=0)
    total[kern.K_MAX_NODES] = counters_done[:, kern.K_MAX_NODES].max()
    total[kern.K_MAX_TRIS] = counters_done[:, kern.K_MAX_TRIS].max()
    rays = int(total[kern.K_RAYS])
    # Throughput counts every ray this call traced, partial pass included, over this call's time.
    rays_session = int(counters[:, kern.K_RAYS].sum()) - (int(resume.counters[kern.K_RAYS]) if resume else 0)
    node_sum = float(sums[:, :, kern.CH_COST_NODES].sum())
    tri_sum = float(sums[:, :, kern.CH_COST_TRIS].sum())
    hist_all = hist_done.sum(axis=0)
    stats = {
        "scene": scene.path,
        "accel": accel.spec,
        "triangles": accel.triangles,
        "build": accel.stats(),
        "render": {
            "seconds": seconds, "width": w, "height": h, "samples": done,
            "samples_requested": settings.samples, "bounces": settings.bounces, "seed": settings.seed,
            "threads": threads_used, "rays_total": rays, "rays_camera": int(total[kern.K_CAMERA]),
            "rays_shadow": int(total[kern.K_SHADOW]),
            "mrays_per_s": rays_session / seconds / 1e6 if seconds > 0 else 0.0,
            "nonfinite_samples": int(total[kern.K_NONFINITE]), "interrupted": interrupted,
            "clamp": clamp if clamp > 0 else None,
        },
        "cost": {
            "nodes_per_ray": {"mean": node_sum / max(rays, 1),
                              **_percentiles(hist_all[0], int(total[kern.K_MAX_NODES]), rays),
                              "max": float(total[kern.K_MAX_NODES])},
            "tris_per_ray": {"mean": tri_sum / max(rays, 1),
                             **_percentiles(hist_all[1], int(total[kern.K_MAX_TRIS]), rays),
                             "max": float(total[kern.K_MAX_TRIS])},
        },
    }
    if resume is not None:
        stats["render"]["resumed_from"] = int(resume.samples_done)
    return RenderResult(radiance, channels, stats, Checkpoint(sums, done, hist_all, total), interrupted)

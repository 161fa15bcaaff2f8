"""Command line: `tracer render | compare | tonemap | inspect | bench`.

main(argv) returns the exit status: 0 done, 2 bad input (one line on stderr naming the file, table,
key or option), 130 interrupted (the samples done so far are written first).
"""
import argparse
import hashlib
import signal
import sys
from pathlib import Path

import numpy as np

from tracer.errors import UserError

EXIT_OK, EXIT_USAGE, EXIT_INTERRUPTED = 0, 2, 130


class _Parser(argparse.ArgumentParser):
    """argparse that reports errors on one line with exit status 2."""

    def error(self, message):
        self.exit(EXIT_USAGE, f"{self.prog}: error: {message} (see: {self.prog} --help)\n")


def _bounded_int(name: str, low: int, high: int):
    def parse(text: str) -> int:
        try:
            value = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"must be a whole number, got {text!r}") from None
        if not low <= value <= high:
            raise argparse.ArgumentTypeError(f"must be in [{low}, {high}], got {value}")
        return value
    return parse


def _positive_float(name: str):
    def parse(text: str) -> float:
        try:
            value = float(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"must be a number, got {text!r}") from None
        if not np.isfinite(value) or value <= 0:
            raise argparse.ArgumentTypeError(f"must be a positive number, got {text}")
        return value
    return parse


def _render_options(parser: argparse.ArgumentParser) -> None:
    from tracer.scene import MAX_BOUNCES, MAX_IMAGE_SIDE, MAX_SAMPLES, MAX_SEED
    parser.add_argument("scene", help="scene description (TOML)")
    parser.add_argument("--samples", type=_bounded_int("--samples", 1, MAX_SAMPLES), help="samples per pixel")
    parser.add_argument("--width", type=_bounded_int("--width", 1, MAX_IMAGE_SIDE),
                        help="image width, pixels")
    parser.add_argument("--height", type=_bounded_int("--height", 1, MAX_IMAGE_SIDE),
                        help="image height, pixels")
    parser.add_argument("--bounces", type=_bounded_int("--bounces", 0, MAX_BOUNCES),
                        help="most surface scatterings on a path (0: emitters and environment seen directly)")
    parser.add_argument("--seed", type=_bounded_int("--seed", 0, MAX_SEED), help="random seed")
    parser.add_argument("--threads", type=_bounded_int("--threads", 1, 1024),
                        help="worker threads (default: all cores); the image does not depend on it")
    parser.add_argument("--out", default="outputs", help="output folder (default: outputs/)")
    parser.add_argument("--leaf-size", type=_bounded_int("--leaf-size", 1, 255), default=4,
                        help="most triangles per leaf the builders aim for (default 4)")
    parser.add_argument("--log-heatmap", action="store_true", help="log colour scale for the cost heat maps")
    parser.add_argument("--clamp", type=_positive_float("--clamp"), metavar="L",
                        help="cap each indirect contribution's largest channel at L (biased; off by default)")
    parser.add_argument("--time-limit", type=_positive_float("--time-limit"), metavar="SECONDS",
                        help="render as many whole sample passes as fit, then save")
    parser.add_argument("--resume", action="store_true",
                        help="continue an interrupted render from its checkpoint up to --samples")
    parser.add_argument("--quiet", action="store_true", help="no progress bar")


def build_parser() -> argparse.ArgumentParser:
    from tracer.tonemap.command import add_arguments as tonemap_arguments
    parser = _Parser(prog="tracer", description="Offline CPU path tracer with acceleration-structure "
                                                "diagnostics.")
    sub = parser.add_subparsers(dest="command", required=True, parser_class=_Parser)
    render = sub.add_parser("render", help="render a scene through one structure")
    _render_options(render)
    render.add_argument("--accel", default="bvh", metavar="SPEC",
                        help="bvh (binned SAH, default), bvh:median, bvh:lbvh (Morton code: fast build), "
                             "kdtree, kdtree:median, brute")
    compare = sub.add_parser("compare", help="render a scene through several structures and compare costs")
    _render_options(compare)
    compare.add_argument("--accel", nargs="+", required=True, metavar="SPEC",
                         help="two or more structures, e.g. bvh kdtree")
    tonemap = sub.add_parser("tonemap", help="turn a linear EXR into a display PNG")
    tonemap_arguments(tonemap)
    inspect = sub.add_parser("inspect", help="build structures only and print their statistics")
    inspect.add_argument("scene", help="scene description (TOML)")
    inspect.add_argument("--accel", nargs="+", default=["bvh"], metavar="SPEC")
    inspect.add_argument("--leaf-size", type=_bounded_int("--leaf-size", 1, 255), default=4)
    inspect.add_argument("--json", metavar="FILE", help="also write the statistics to FILE")
    bench = sub.add_parser("bench", help="measure build time and ray throughput on generated scenes")
    bench.add_argument("--quick", action="store_true", help="small suite, under a minute")
    bench.add_argument("--json", metavar="FILE", help="also write the results to FILE")
    return parser


class _StopFlag:
    """Turns SIGINT/SIGTERM into a flag the render loop polls; a second Ctrl-C aborts at once."""

    def __init__(self):
        self.raised = False
        self._previous = {}

    def __enter__(self):
        for sig in (signal.SIGINT, signal.SIGTERM):
            self._previous[sig] = signal.signal(sig, self._handle)
        return self

    def _handle(self, signum, frame):
        if self.raised:
            raise KeyboardInterrupt
        self.raised = True
        print("\ninterrupted: finishing the current rows, then saving the samples done", file=sys.stderr,
              flush=True)

    def __exit__(self, *exc):
        for sig, handler in self._previous.items():
            signal.signal(sig, handler)
        return False

    def __call__(self) -> bool:
        return self.raised


def _fingerprint(scene, settings, spec: str, leaf_size: int, clamp: float | None) -> str:
    """What a checkpoint must match to be resumed: geometry, materials, camera, settings but samples."""
    digest = hashlib.sha256()
    for array in (scene.vertices, scene.faces, scene.material_of, scene.material_params, scene.environment):
        digest.update(np.ascontiguousarray(array).tobytes())
    digest.update(repr((tuple(map(tuple, scene.camera[:3])), scene.camera[3:], settings._replace(samples=0),
                        spec, leaf_size, clamp)).encode())
    return digest.hexdigest()


def _load_checkpoint(path: Path, fingerprint: str):
    from tracer.render import Checkpoint
    if not path.exists():
        raise UserError(f"{path}: --resume: no checkpoint to resume from")
    with np.load(path) as data:
        if str(data["fingerprint"]) != fingerprint:
            raise UserError(f"{path}: --resume: the checkpoint was made with another scene or settings")
        return Checkpoint(data["sums"], int(data["samples_done"]), data["hist"], data["counters"])


def _render_one(scene, spec: str, args, stop: _StopFlag):
    """Render through one structure and write its outputs; returns (result, paths)."""
    from tracer.accel import parse_spec, spec_name
    from tracer.render import render, resolve_settings
    from tracer.render.outputs import checkpoint_path, output_stem, write_checkpoint, write_render_outputs
    spec = spec_name(*parse_spec(spec))
    settings = resolve_settings(scene, samples=args.samples, width=args.width, height=args.height,
                                bounces=args.bounces, seed=args.seed)
    stem = output_stem(args.out, scene.name, spec)
    fingerprint = _fingerprint(scene, settings, spec, args.leaf_size, args.clamp)
    resume = _load_checkpoint(checkpoint_path(stem), fingerprint) if args.resume else None
    result = render(scene, accel=spec, samples=settings.samples, width=settings.width,
                    height=settings.height, bounces=settings.bounces, seed=settings.seed,
                    threads=args.threads, leaf_size=args.leaf_size, progress=not args.quiet,
                    should_stop=stop, resume=resume, time_limit=args.time_limit,
                    clamp=args.clamp)
    paths = write_render_outputs(result, args.out, scene.name, spec, log_heatmap=args.log_heatmap)
    if result.checkpoint.samples_done < settings.samples:
        paths.append(write_checkpoint(stem, result.checkpoint, fingerprint))
    elif checkpoint_path(stem).exists():
        checkpoint_path(stem).unlink()
    return result, paths


def _cmd_render(args) -> int:
    from tracer.scene import load_scene
    scene = load_scene(args.scene)
    for warning in scene.warnings:
        print(f"warning: {warning}", file=sys.stderr)
    Path(args.out).mkdir(parents=True, exist_ok=True)
    with _StopFlag() as stop:
        result, paths = _render_one(scene, args.accel, args, stop)
    for path in paths:
        print(path)
    r = result.stats["render"]
    print(f"{r['samples']} samples/pixel, {r['rays_total']:,} rays in {r['seconds']:.1f} s "
          f"({r['mrays_per_s']:.2f} Mrays/s)", file=sys.stderr)
    return EXIT_INTERRUPTED if result.interrupted else EXIT_OK


def _cmd_compare(args) -> int:
    from tracer.diagnostics.compare import run_compare
    return run_compare(args, _render_one, _StopFlag)


def _cmd_inspect(args) -> int:
    from tracer.diagnostics.compare import run_inspect
    return run_inspect(args)


def _cmd_tonemap(args) -> int:
    from tracer.tonemap.command import run
    return run(args)


def _cmd_bench(args) -> int:
    from tracer.bench import run_bench
    return run_bench(quick=args.quick, json_path=args.json)


COMMANDS = {"render": _cmd_render, "compare": _cmd_compare, "inspect": _cmd_inspect, "tonemap": _cmd_tonemap,
            "bench": _cmd_bench}


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return COMMANDS[args.command](args)
    except UserError as error:
        print(f"tracer {args.command}: error: {error}", file=sys.stderr)
        return EXIT_USAGE
    except KeyboardInterrupt:
        print("tracer: interrupted", file=sys.stderr)
        return EXIT_INTERRUPTED
    except OSError as error:            # unwritable output folder, disk full: the user's to fix
        print(f"tracer {args.command}: error: {error.filename or ''}: {error.strerror}", file=sys.stderr)
        return EXIT_USAGE


if __name__ == "__main__":
    sys.exit(main())

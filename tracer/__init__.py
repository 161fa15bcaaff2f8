"""tracer: an offline CPU path tracer with diagnostics of its ray-tracing acceleration structures."""
from tracer import _kernel_cache

_kernel_cache.configure()       # before any kernel module is imported

from tracer.accel import build_accel  # noqa: E402
from tracer.render import render as _render  # noqa: E402
from tracer.scene import load_scene  # noqa: E402
from tracer.tonemap import tonemap  # noqa: E402


def render(scene, accel="bvh", **options):
    """Path-trace a loaded scene (or a scene file path); see tracer.render.driver.render for options."""
    if not hasattr(scene, "vertices"):
        scene = load_scene(scene)
    return _render(scene, accel=accel, **options)


__all__ = ["load_scene", "build_accel", "render", "tonemap"]
__version__ = "0.1.0"

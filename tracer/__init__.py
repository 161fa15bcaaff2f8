"""tracer: an offline CPU path tracer with diagnostics of its ray-tracing acceleration structures."""
from tracer.accel import build_accel
from tracer.render import render as _render
from tracer.scene import load_scene
from tracer.tonemap import tonemap


def render(scene, accel="bvh", **options):
    """Path-trace a loaded scene (or a scene file path); see tracer.render.driver.render for options."""
    if not hasattr(scene, "vertices"):
        scene = load_scene(scene)
    return _render(scene, accel=accel, **options)


__all__ = ["load_scene", "build_accel", "render", "tonemap"]
__version__ = "0.1.0"

"""The path tracer: camera, random numbers, integrator kernel and the render driver."""
from tracer.render.driver import CHANNEL_NAMES, Checkpoint, RenderResult, render, resolve_settings

__all__ = ["CHANNEL_NAMES", "Checkpoint", "RenderResult", "render", "resolve_settings"]

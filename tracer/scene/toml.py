"""Read a scene file (TOML, parsed by the standard library's tomllib), validate it, triangulate it.

The format is INTERFACE.md, "Scene file (TOML)". Every key is checked for type, range and meaning;
unknown tables and keys are errors. Each error is one `UserError` line built by
`tracer.errors.input_error`:

    FILE: [TABLE] KEY: must be EXPECTATION, got VALUE

with TABLE one of ``render``, ``camera``, ``environment``, ``materials.NAME`` or ``objects.N`` (N
counts the ``[[objects]]`` entries from 1, in file order), VALUE written as in TOML. A TOML syntax
error reads ``FILE: line L, column C: TOML syntax error: ...``.

Defaults for omitted optional keys:

    [render]       width 640, height 400, samples 64, bounces 8, seed 1 (RenderSettings);
                   width and height in 1..16384 with at most 100 M pixels, samples in 1..2^20,
                   bounces in 0..1024, seed in 0..2^63-1
    [camera]       up [0, 1, 0], fov 40 (vertical, degrees), aperture 0 (pinhole),
                   focus_distance = |look_at - position|; position and look_at are required
    [environment]  radiance [0, 0, 0]
    diffuse        albedo [0.8, 0.8, 0.8], emission [0, 0, 0], two_sided false
    emitter        radiance required, two_sided false
    metal          color [0.9, 0.9, 0.9], roughness 0 (a mirror)
    glass          ior 1.5
    every object   shape and material required; translate [0, 0, 0], rotate [0, 0, 0], scale 1
    rect           center [0, 0, 0], size [1, 1], normal [0, 1, 0],
                   tangent: world +X projected into the plane, +Z if the normal is along X
    box            center [0, 0, 0], size [1, 1, 1]
    sphere         center [0, 0, 0], radius 1, subdivisions 3 (1280 triangles; 0..9)
    disk           center [0, 0, 0], radius 1, normal [0, 1, 0], segments 64 (3..2^20),
                   tangent (optional, where the first rim vertex lies) as for rect
    mesh           file required (relative to the scene file's folder)

Extensions beyond INTERFACE.md: two procedural shapes (tracer/scene/procedural.py, where the methods
are cited). Both are deterministic functions of their keys, `seed` included, and take the common
keys (material, translate, rotate, scale; scale and rotation act about `center`):

    terrain        a heightfield of fractal gradient noise (fBm) facing +Y, triangles counter-clockwise
                   seen from above; center [0, 0, 0] (the middle of the base plane),
                   size [10, 10] (extent along x, then z), resolution 64 (cells per side: one integer,
                   or [nx, nz]; each in 1..8192; 2·nx·nz triangles, at most 2^23),
                   height 1 (>= 0: the surface stays within center.y ± height; typical peaks reach
                   about half of it), feature_size = the larger side / 4 (width of the largest hills;
                   at least the larger side / 1e6), octaves 6 (1..16; each octave doubles the
                   frequency), roughness 0.5 (in (0, 1]: amplitude ratio of successive octaves;
                   higher is more rugged), seed 0 (0..2^63-1)
    scatter        count copies of a small closed solid at uniform random centres inside a box;
                   center [0, 0, 0] and size [1, 1, 1] (>= 0 each; 0 puts all centres in a plane) of
                   that box, count 100 (at most 2^23 triangles in all), piece "sphere" ("sphere": an
                   icosphere of subdivisions 1 (0..5; only with "sphere"), "tetrahedron" (regular),
                   "box" (a cube); each with its vertices on the sphere of `radius`), radius 0.05,
                   stretch [1, 1, 1] (each piece's own x, y, z scale before its rotation, e.g.
                   [0.03, 1, 0.03] with piece "box" gives needles), rotation "random" ("random":
                   uniform over all rotations, "about_y": a random turn about +Y, "none"),
                   variation 0 (in [0, 1): each radius is multiplied by a uniform number in
                   [1 - variation, 1]), seed 0

Albedo and metal color are reflectances, so each channel must lie in [0, 1]; emission, radiance and
environment only need to be >= 0 (and at most 1e30, as ior, to stay finite in float32). Scale must be
positive (a mirroring scale would turn the front faces inward). Positions (camera, centres,
translations) and the transformed vertices must lie within ±1e15 scene units, far inside the float32
range of the kernels. Zero-area triangles are dropped with a warning in `Scene.warnings`.
"""
import math
import re
import tomllib
from pathlib import Path

import numpy as np

from tracer.errors import UserError, input_error
from tracer.scene import procedural, shapes
from tracer.scene.mesh import read_mesh
from tracer.scene.types import (
    M_COLOR,
    M_EMISSION,
    M_IOR,
    M_KIND,
    M_ROUGHNESS,
    M_TWO_SIDED,
    MATERIAL_COLUMNS,
    MATERIAL_KINDS,
    Camera,
    RenderSettings,
    Scene,
)

MAX_IMAGE_SIDE = 16384
MAX_IMAGE_PIXELS = 100_000_000
MAX_SAMPLES = 1 << 20
MAX_BOUNCES = 1024
MAX_SEED = (1 << 63) - 1          # the largest TOML integer
MAX_COORDINATE = 1e15
MAX_SUBDIVISIONS = 9              # 5.2 M triangles
MAX_SEGMENTS = 1 << 20
MAX_MATERIAL_VALUE = 1e30         # radiance and ior stay finite in the kernels' float32
MAX_GENERATED_TRIANGLES = 1 << 23  # 8.4 M triangles from one terrain or scatter (~0.6 GB of arrays)
MAX_TERRAIN_SIDE = 1 << 13        # cells along one side of a terrain
MAX_OCTAVES = 16
MAX_TERRAIN_DETAIL = 1e6          # largest-feature cells across a terrain, keeps noise input precise
MAX_PIECE_SUBDIVISIONS = 5        # 20480 triangles per scatter piece

TOP_LEVEL = ("render", "camera", "environment", "materials", "objects")
RENDER_KEYS = ("width", "height", "samples", "bounces", "seed")
CAMERA_KEYS = ("position", "look_at", "up", "fov", "aperture", "focus_distance")
MATERIAL_KEYS = {
    "diffuse": ("type", "albedo", "emission", "two_sided"),
    "emitter": ("type", "radiance", "two_sided"),
    "metal": ("type", "color", "roughness"),
    "glass": ("type", "ior"),
}
OBJECT_KEYS = ("shape", "material", "translate", "rotate", "scale")
SHAPE_KEYS = {
    "rect": ("center", "size", "normal", "tangent"),
    "box": ("center", "size"),
    "sphere": ("center", "radius", "subdivisions"),
    "disk": ("center", "radius", "normal", "segments", "tangent"),
    "mesh": ("file",),
    "terrain": ("center", "size", "resolution", "height", "feature_size", "octaves", "roughness", "seed"),
    "scatter": ("center", "size", "count", "piece", "subdivisions", "radius", "stretch", "rotation",
                "variation", "seed"),
}
_REQUIRED = object()
_SHOWN_LENGTH = 60


def _printable(text: str) -> str:
    """`text` with every non-printable character (newlines included) escaped, so messages stay one line."""
    return "".join(c if c.isprintable() else f"\\u{ord(c):04x}" for c in text)


def _quoted(text: str) -> str:
    return '"' + _printable(text.replace("\\", "\\\\").replace('"', '\\"')) + '"'


def _key_text(key: str) -> str:
    """A key as TOML writes it: bare when it can be, quoted otherwise."""
    return key if re.fullmatch(r"[A-Za-z0-9_-]+", key) else _quoted(key)


def _show(value) -> str:
    """A TOML value as the user wrote it, shortened to one short line for a message."""
    if isinstance(value, bool):
        text = "true" if value else "false"
    elif isinstance(value, str):
        text = _quoted(value)
    elif isinstance(value, int):
        try:
            text = str(value)
        except ValueError:  # more digits than Python converts to text
            text = "a very large integer"
    elif isinstance(value, float):
        text = repr(value)
    elif isinstance(value, list):
        text = "[" + ", ".join(_show(item) for item in value[:8]) + (", ...]" if len(value) > 8 else "]")
    elif isinstance(value, dict):
        text = "{" + ", ".join(f"{_key_text(str(k))} = {_show(v)}" for k, v in list(value.items())[:4]) + "}"
    elif hasattr(value, "isoformat"):
        text = value.isoformat()
    else:
        text = _printable(repr(value))
    return text if len(text) <= _SHOWN_LENGTH else text[:_SHOWN_LENGTH - 3] + "..."


def _as_float(value) -> float | None:
    """The finite float `value` stands for, or None (bools, text, NaN, infinities are not numbers)."""
    if isinstance(value, bool) or not isinstance(value, int | float):
        return None
    try:
        number = float(value)
    except OverflowError:
        return None
    return number if math.isfinite(number) else None


class _Table:
    """One TOML table under validation: reads its keys, checks them, names itself in errors."""

    def __init__(self, path: str, name: str, data: dict):
        self.path, self.name, self.data = path, name, data

    def error(self, key: str | None, problem: str) -> UserError:
        return input_error(self.path, self.name, None if key is None else _key_text(key), problem)

    def only(self, allowed, context: str = "") -> None:
        for key in self.data:
            if key not in allowed:
                raise self.error(key, f"unknown key{context}; expected one of {', '.join(sorted(allowed))}")

    def raw(self, key: str, default):
        if key in self.data:
            return self.data[key]
        if default is _REQUIRED:
            raise self.error(key, "required key is missing")
        return default

    def invalid(self, key: str, expectation: str) -> UserError:
        return self.error(key, f"must be {expectation}, got {_show(self.data[key])}")

    def number(self, key: str, default=_REQUIRED, accept=lambda x: True, expectation="a finite number"):
        value = self.raw(key, default)
        if key not in self.data:
            return value
        number = _as_float(value)
        if number is None or not accept(number):
            raise self.invalid(key, expectation)
        return number

    def integer(self, key: str, default, low: int, high: int) -> int:
        value = self.raw(key, default)
        if key in self.data and (type(value) is not int or not low <= value <= high):
            raise self.invalid(key, f"an integer in [{low}, {high}]")
        return value

    def boolean(self, key: str, default) -> bool:
        value = self.raw(key, default)
        if key in self.data and not isinstance(value, bool):
            raise self.invalid(key, "true or false")
        return value

    def text(self, key: str, default=_REQUIRED) -> str:
        value = self.raw(key, default)
        if key in self.data and not isinstance(value, str):
            raise self.invalid(key, "a string")
        return value

    def vector(self, key: str, default, length: int, accept=lambda x: True,
               expectation: str | None = None) -> np.ndarray:
        """A list of `length` finite numbers, each passing `accept`, as a float64 array."""
        value = self.raw(key, default)
        if key not in self.data:
            return np.array(value, dtype=np.float64)
        numbers = [_as_float(item) for item in value] if isinstance(value, list) else []
        if len(numbers) != length or any(x is None or not accept(x) for x in numbers):
            raise self.invalid(key, expectation or f"a list of {length} finite numbers")
        return np.array(numbers, dtype=np.float64)

    def position(self, key: str, default=_REQUIRED) -> np.ndarray:
        return self.vector(key, default, 3, lambda x: abs(x) <= MAX_COORDINATE,
                           f"a list of 3 numbers in [-{MAX_COORDINATE:g}, {MAX_COORDINATE:g}]")

    def direction(self, key: str, default) -> np.ndarray:
        """A unit vector from a non-zero list of 3 finite numbers."""
        vector = self.vector(key, default, 3)
        direction = shapes.unit(vector)
        if direction is None:
            raise self.invalid(key, "a non-zero list of 3 finite numbers")
        return direction

    def colour(self, key: str, default=_REQUIRED, reflectance: bool = False) -> np.ndarray:
        if reflectance:
            return self.vector(key, default, 3, lambda x: 0.0 <= x <= 1.0,
                               "a list of 3 numbers in [0, 1] (linear RGB reflectance)")
        return self.vector(key, default, 3, lambda x: 0.0 <= x <= MAX_MATERIAL_VALUE,
                           f"a list of 3 numbers in [0, {MAX_MATERIAL_VALUE:g}] (linear RGB)")


def _subtable(path: str, name: str, value) -> _Table:
    """Wrap `value`, which must be a TOML table."""
    if not isinstance(value, dict):
        raise input_error(path, name, None, f"must be a table, got {_show(value)}")
    return _Table(path, name, value)


def _settings(table: _Table) -> RenderSettings:
    table.only(RENDER_KEYS)
    defaults = RenderSettings()
    width = table.integer("width", defaults.width, 1, MAX_IMAGE_SIDE)
    height = table.integer("height", defaults.height, 1, MAX_IMAGE_SIDE)
    if width * height > MAX_IMAGE_PIXELS:
        raise table.error("height", f"width x height = {width} x {height} = {width * height} pixels is "
                                    f"more than the limit of {MAX_IMAGE_PIXELS}")
    return RenderSettings(
        width=width,
        height=height,
        samples=table.integer("samples", defaults.samples, 1, MAX_SAMPLES),
        bounces=table.integer("bounces", defaults.bounces, 0, MAX_BOUNCES),
        seed=table.integer("seed", defaults.seed, 0, MAX_SEED),
    )


def _camera(table: _Table) -> Camera:
    table.only(CAMERA_KEYS)
    position = table.position("position")
    look_at = table.position("look_at")
    view = shapes.unit(look_at - position)
    if view is None:
        raise table.error("look_at", f"must differ from position, got {_show(table.data['look_at'])} "
                                     "for both")
    up = table.direction("up", [0.0, 1.0, 0.0])
    if np.linalg.norm(np.cross(up, view)) <= shapes.PARALLEL_SINE:
        given = f"got {_show(table.data['up'])}" if "up" in table.data else "as the default [0, 1, 0] is"
        raise table.error("up", f"must not be parallel to the view direction look_at - position, {given}")
    distance = float(np.linalg.norm(look_at - position))
    return Camera(
        position=position,
        look_at=look_at,
        up=table.vector("up", [0.0, 1.0, 0.0], 3),
        fov=table.number("fov", 40.0, lambda x: 0.0 < x < 180.0, "a number of degrees in (0, 180)"),
        aperture=table.number("aperture", 0.0, lambda x: x >= 0.0, "a finite number >= 0"),
        focus_distance=table.number("focus_distance", distance, lambda x: x > 0.0, "a positive number"),
    )


def _material_row(table: _Table) -> np.ndarray:
    """One row of `Scene.material_params` (layout in types.py)."""
    kind_name = table.text("type")
    if kind_name not in MATERIAL_KEYS:
        raise table.error("type", f"unknown material type {_show(kind_name)}; expected one of "
                                  f"{', '.join(MATERIAL_KEYS)}")
    table.only(MATERIAL_KEYS[kind_name], f' for material type "{kind_name}"')
    row = np.zeros(MATERIAL_COLUMNS, dtype=np.float64)
    row[M_KIND] = MATERIAL_KINDS[kind_name]
    if kind_name == "diffuse":
        row[M_COLOR:M_COLOR + 3] = table.colour("albedo", [0.8, 0.8, 0.8], reflectance=True)
        row[M_EMISSION:M_EMISSION + 3] = table.colour("emission", [0.0, 0.0, 0.0])
        row[M_TWO_SIDED] = table.boolean("two_sided", False)
    elif kind_name == "emitter":
        row[M_EMISSION:M_EMISSION + 3] = table.colour("radiance")
        row[M_TWO_SIDED] = table.boolean("two_sided", False)
    elif kind_name == "metal":
        row[M_COLOR:M_COLOR + 3] = table.colour("color", [0.9, 0.9, 0.9], reflectance=True)
        row[M_ROUGHNESS] = table.number("roughness", 0.0, lambda x: 0.0 <= x <= 1.0, "a number in [0, 1]")
    else:
        row[M_COLOR:M_COLOR + 3] = 1.0  # a smooth dielectric passes or reflects all light: albedo 1
        row[M_IOR] = table.number("ior", 1.5, lambda x: 0.0 < x <= MAX_MATERIAL_VALUE,
                                  f"a number in (0, {MAX_MATERIAL_VALUE:g}]")
    return row.astype(np.float32)


def _materials(path: str, value) -> tuple[tuple[str, ...], np.ndarray]:
    materials = _subtable(path, "materials", value)
    names, rows = [], []
    for name, entry in materials.data.items():
        table_name = f"materials.{_key_text(name)}"
        if not isinstance(entry, dict):
            raise input_error(path, table_name, None,
                              f"must be a table (a [{table_name}] header with a type), got {_show(entry)}")
        if not name:
            raise input_error(path, table_name, None, "a material name must not be empty")
        names.append(name)
        rows.append(_material_row(_Table(path, table_name, entry)))
    params = np.array(rows, dtype=np.float32).reshape(len(rows), MATERIAL_COLUMNS)
    return tuple(names), params


def _scale(table: _Table) -> np.ndarray:
    value = table.raw("scale", 1.0)
    number = _as_float(value)
    if number is not None and number > 0.0:
        return np.full(3, number)
    if isinstance(value, list):
        numbers = [_as_float(item) for item in value]
        if len(numbers) == 3 and all(x is not None and x > 0.0 for x in numbers):
            return np.array(numbers, dtype=np.float64)
    raise table.invalid("scale", "a positive number or a list of 3 positive numbers")


def _plane_frame(table: _Table) -> tuple[np.ndarray, np.ndarray]:
    """Unit normal and in-plane unit tangent of a rect or disk."""
    normal = table.direction("normal", [0.0, 1.0, 0.0])
    if "tangent" not in table.data:
        return normal, shapes.default_tangent(normal)
    tangent = shapes.project_tangent(normal, table.vector("tangent", None, 3))
    if tangent is None:
        raise table.invalid("tangent", "a non-zero list of 3 finite numbers not parallel to normal")
    return normal, tangent


def _resolution(table: _Table) -> tuple[int, int]:
    """Terrain cells along x and z: one integer for both, or a list of two."""
    value = table.raw("resolution", 64)
    cells = [value, value] if type(value) is int else value
    if not (isinstance(cells, list) and len(cells) == 2
            and all(type(n) is int and 1 <= n <= MAX_TERRAIN_SIDE for n in cells)):
        raise table.invalid("resolution", f"an integer in [1, {MAX_TERRAIN_SIDE}] or a list of 2 of them")
    if 2 * cells[0] * cells[1] > MAX_GENERATED_TRIANGLES:
        raise table.invalid("resolution", f"at most {MAX_GENERATED_TRIANGLES} triangles (2 per cell)")
    return cells[0], cells[1]


def _choice(table: _Table, key: str, default: str, choices: tuple[str, ...]) -> str:
    value = table.text(key, default)
    if value not in choices:
        raise table.invalid(key, "one of " + ", ".join(_quoted(choice) for choice in choices))
    return value


def _terrain(table: _Table):
    """The vertices and faces of a `terrain` object in its own frame (procedural.terrain)."""
    size = table.vector("size", [10.0, 10.0], 2, lambda x: x > 0.0, "a list of 2 positive finite numbers")
    resolution = _resolution(table)
    larger_side = float(size.max())
    feature_size = table.number("feature_size", larger_side / 4.0, lambda x: x > 0.0,
                                "a positive finite number")
    if larger_side / feature_size > MAX_TERRAIN_DETAIL:
        raise table.invalid("feature_size", f"at least the larger side / {MAX_TERRAIN_DETAIL:g} "
                                            f"= {larger_side / MAX_TERRAIN_DETAIL:g}")
    return procedural.terrain(
        size, resolution,
        height=table.number("height", 1.0, lambda x: x >= 0.0, "a finite number >= 0"),
        feature_size=feature_size,
        octaves=table.integer("octaves", 6, 1, MAX_OCTAVES),
        roughness=table.number("roughness", 0.5, lambda x: 0.0 < x <= 1.0, "a number in (0, 1]"),
        seed=table.integer("seed", 0, 0, MAX_SEED),
    )


def _scatter(table: _Table):
    """The vertices and faces of a `scatter` object in its own frame (procedural.scatter)."""
    piece = _choice(table, "piece", "sphere", procedural.PIECES)
    if "subdivisions" in table.data and piece != "sphere":
        raise table.error("subdivisions", f'applies only to piece = "sphere", not to {_quoted(piece)}')
    subdivisions = table.integer("subdivisions", 1, 0, MAX_PIECE_SUBDIVISIONS)
    per_piece = procedural.piece_triangles(piece, subdivisions)
    most = MAX_GENERATED_TRIANGLES // per_piece
    count = table.integer("count", 100, 1, MAX_GENERATED_TRIANGLES)
    if count > most:
        raise table.invalid("count", f"at most {most} for {per_piece}-triangle pieces "
                                     f"({MAX_GENERATED_TRIANGLES} triangles in all)")
    return procedural.scatter(
        table.vector("size", [1.0, 1.0, 1.0], 3, lambda x: x >= 0.0, "a list of 3 finite numbers >= 0"),
        count, piece, subdivisions,
        radius=table.number("radius", 0.05, lambda x: x > 0.0, "a positive finite number"),
        stretch=table.vector("stretch", [1.0, 1.0, 1.0], 3, lambda x: x > 0.0,
                             "a list of 3 positive finite numbers"),
        rotation=_choice(table, "rotation", "random", procedural.ROTATIONS),
        variation=table.number("variation", 0.0, lambda x: 0.0 <= x < 1.0, "a number in [0, 1)"),
        seed=table.integer("seed", 0, 0, MAX_SEED),
    )


def _local_shape(table: _Table, shape: str, scene_path: str, base_dir: Path):
    """The shape in its own frame: (vertices, faces, centre that scale and rotation act about)."""
    def positive(x: float) -> bool:
        return x > 0.0

    if shape == "mesh":
        file_name = table.text("file")
        vertices, faces = read_mesh(base_dir / file_name, scene_path, table.name, _show(file_name))
        return vertices, faces, np.zeros(3)
    center = table.position("center", [0.0, 0.0, 0.0])
    if shape == "rect":
        width, height = table.vector("size", [1.0, 1.0], 2, positive, "a list of 2 positive finite numbers")
        vertices, faces = shapes.rect(width, height, *_plane_frame(table))
    elif shape == "box":
        size = table.vector("size", [1.0, 1.0, 1.0], 3, positive, "a list of 3 positive finite numbers")
        vertices, faces = shapes.box(size)
    elif shape == "sphere":
        radius = table.number("radius", 1.0, positive, "a positive finite number")
        vertices, faces = shapes.sphere(radius, table.integer("subdivisions", 3, 0, MAX_SUBDIVISIONS))
    elif shape == "terrain":
        vertices, faces = _terrain(table)
    elif shape == "scatter":
        vertices, faces = _scatter(table)
    else:
        radius = table.number("radius", 1.0, positive, "a positive finite number")
        normal, tangent = _plane_frame(table)
        vertices, faces = shapes.disk(radius, normal, tangent, table.integer("segments", 64, 3, MAX_SEGMENTS))
    return vertices, faces, center


def _object(table: _Table, material_ids: dict, scene_path: str, base_dir: Path, warnings: list):
    """World-space (vertices, faces, material id) of one [[objects]] entry."""
    shape = table.text("shape")
    if shape not in SHAPE_KEYS:
        raise table.error("shape", f"unknown shape {_show(shape)}; expected one of {', '.join(SHAPE_KEYS)}")
    table.only(OBJECT_KEYS + SHAPE_KEYS[shape], f' for shape "{shape}"')
    material = table.text("material")
    if material not in material_ids:
        names = [_quoted(name) for name in material_ids]
        defined = ", ".join(names[:8]) + (", ..." if len(names) > 8 else "") if names else "none"
        raise table.error("material", f"unknown material {_show(material)}; defined materials: {defined}")
    scale = _scale(table)
    rotate = table.vector("rotate", [0.0, 0.0, 0.0], 3, expectation="a list of 3 finite angles in degrees")
    translate = table.position("translate", [0.0, 0.0, 0.0])
    vertices, faces, center = _local_shape(table, shape, scene_path, base_dir)
    world = shapes.transform(vertices, scale, rotate, center + translate)
    if not (np.abs(world) <= MAX_COORDINATE).all():
        raise table.error(None, f"the transformed {shape} reaches beyond ±{MAX_COORDINATE:g} scene units "
                                "(check its size, scale and translate)")
    kept, dropped = shapes.drop_degenerate(world, faces)
    key, file_prefix = ("file", f"{_show(table.data['file'])}: ") if shape == "mesh" else (None, "")
    if kept.shape[0] == 0:
        raise table.error(key, f"{file_prefix}all {faces.shape[0]} triangles are degenerate (zero area)")
    if dropped:
        warnings.append(str(table.error(key, f"{file_prefix}dropped {dropped} of {faces.shape[0]} triangles "
                                             "that are degenerate (zero area)")))
    return world, kept, material_ids[material]


def scene_from_document(document: dict, path) -> Scene:
    """Validate a parsed scene document (the dict tomllib returns) and triangulate it.

    `path` is the scene file: it names the file in error messages and anchors relative mesh paths.
    """
    shown = _printable(str(path))
    for key, value in document.items():
        if key not in TOP_LEVEL:
            if isinstance(value, dict):
                raise input_error(shown, _key_text(key), None,
                                  f"unknown table; expected one of {', '.join(TOP_LEVEL)}")
            raise input_error(shown, None, _key_text(key),
                              f"unknown top-level key; expected one of the tables {', '.join(TOP_LEVEL)}")
    settings = _settings(_subtable(shown, "render", document.get("render", {})))
    if "camera" not in document:
        raise input_error(shown, "camera", None, "required table is missing (it needs position and look_at)")
    camera = _camera(_subtable(shown, "camera", document["camera"]))
    environment_table = _subtable(shown, "environment", document.get("environment", {}))
    environment_table.only(("radiance",))
    environment = environment_table.colour("radiance", [0.0, 0.0, 0.0])
    names, material_params = _materials(shown, document.get("materials", {}))
    material_ids = {name: index for index, name in enumerate(names)}

    objects = document.get("objects")
    if not isinstance(objects, list) or not objects:
        problem = "at least one [[objects]] entry is required"
        if objects is not None:
            problem += f"; got {_show(objects)}"
        raise input_error(shown, "objects", None, problem)
    warnings: list[str] = []
    vertex_blocks, face_blocks, material_blocks = [], [], []
    vertex_count = 0
    for index, entry in enumerate(objects, start=1):
        table = _subtable(shown, f"objects.{index}", entry)
        vertices, faces, material = _object(table, material_ids, shown, Path(path).parent, warnings)
        vertex_blocks.append(vertices)
        face_blocks.append(faces + vertex_count)
        material_blocks.append(np.full(faces.shape[0], material, dtype=np.int32))
        vertex_count += vertices.shape[0]
    if vertex_count > np.iinfo(np.int32).max:
        raise input_error(shown, "objects", None,
                          f"{vertex_count} vertices are more than int32 indices can hold")

    material_of = np.concatenate(material_blocks)
    emits = (material_params[:, M_EMISSION:M_EMISSION + 3] > 0.0).any(axis=1)
    emitters = np.flatnonzero(emits[material_of]).astype(np.int32)
    if emitters.size == 0 and not (environment > 0.0).any():
        unlit = "no light: no material in use emits and [environment] radiance is 0; the image will be black"
        warnings.append(str(input_error(shown, None, None, unlit)))
    return Scene(
        path=str(path),
        name=Path(path).stem,
        vertices=np.concatenate(vertex_blocks),
        faces=np.concatenate(face_blocks).astype(np.int32),
        material_of=material_of,
        material_names=names,
        material_params=material_params,
        emitters=emitters,
        camera=camera,
        environment=environment,
        settings=settings,
        warnings=tuple(warnings),
    )


def _syntax_error(shown: str, text: str, error: tomllib.TOMLDecodeError) -> UserError:
    """Turn tomllib's "problem (at line L, column C)" into `FILE: line L, column C: ...`."""
    message = str(error)
    match = re.fullmatch(r"(.*) \(at (line \d+, column \d+|end of document)\)", message, flags=re.DOTALL)
    if match is None:
        return input_error(shown, None, None, f"TOML syntax error: {_printable(message)}")
    problem, where = match.groups()
    if where == "end of document":
        where = f"line {text.count(chr(10)) + 1} (end of file)"
    return input_error(shown, None, where, f"TOML syntax error: {_printable(problem)}")


def load_scene(path) -> Scene:
    """Read, validate and triangulate the scene file at `path` (INTERFACE.md, "Scene file (TOML)").

    Raises `UserError` with one line naming the file, table and key for any mistake in the file
    or in a mesh file it refers to.
    """
    shown = _printable(str(path))
    try:
        data = Path(path).read_bytes()
    except (OSError, ValueError) as error:  # ValueError: a NUL character in the path
        problem = f"cannot read the scene file ({getattr(error, 'strerror', None) or error})"
        raise input_error(shown, None, None, problem) from None
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as error:
        line = data[:error.start].count(b"\n") + 1
        raise input_error(shown, None, f"line {line}", "not UTF-8 text (TOML files are UTF-8)") from None
    text = text.removeprefix("\ufeff")  # a byte-order mark some editors write
    try:
        document = tomllib.loads(text)
    except tomllib.TOMLDecodeError as error:
        raise _syntax_error(shown, text, error) from None
    except (ValueError, RecursionError) as error:  # e.g. integers beyond Python's digit limit
        raise input_error(shown, None, None, f"cannot parse TOML ({_printable(str(error))})") from None
    return scene_from_document(document, path)

"""Procedural shapes: a fractal heightfield (``terrain``) and many small solids at random (``scatter``).

Both are pure functions of their parameters and an integer seed: the random numbers come from a
counter-based hash, the 64-bit finaliser of SplitMix64,

    Guy L. Steele Jr., Doug Lea, Christine H. Flood (2014), "Fast splittable pseudorandom number
    generators", OOPSLA '14, 453-472, doi:10.1145/2660193.2660195,

applied to (seed, stream, index), so a file renders the same on every machine and numpy version.
Everything is vectorised over vertices or pieces (no Python loop per vertex); 1 M triangles take a
few tenths of a second.

**terrain** samples fractional Brownian motion (fBm) built from gradient noise on a regular grid:

    Ken Perlin (1985), "An image synthesizer", SIGGRAPH '85, Computer Graphics 19(3), 287-296,
    doi:10.1145/325165.325247 (gradient noise: a random gradient at each integer lattice point, the
    noise is 0 there and blends the four corner ramps g·(p - corner) in between);
    Ken Perlin (2002), "Improving noise", ACM TOG 21(3), 681-682, doi:10.1145/566654.566636
    (the blending curve 6t^5 - 15t^4 + 10t^3, whose first and second derivatives vanish at 0 and 1);
    F. Kenton Musgrave, "Procedural fractal terrains", ch. 16 of Ebert, Musgrave, Peachey, Perlin,
    Worley (2003), "Texturing and Modeling: A Procedural Approach", 3rd ed., Morgan Kaufmann
    (fBm: a sum of octaves, each at twice the frequency (lacunarity 2) and `roughness` times the
    amplitude of the one before).

Our departures: gradients are drawn from 16 unit directions by the hash instead of Perlin's
permutation table (no period, nothing to store); each octave is shifted by a random offset so that the
lattice points of the octaves do not line up; the sum is divided by its largest possible value, so
the surface stays within ±`height` of its centre: N-dimensional gradient noise with unit gradients
lies within ±√N/2 (from memory; for N = 2 the extreme is the cell centre with all four gradients
pointing at it), hence the factor √2 per octave. Vertex x and z are (i/n - 1/2)·size, so a grid of
2n cells holds the exact vertices of the grid of n cells: one seed is one landscape at every
resolution. Triangles wind counter-clockwise seen from above (+Y is the front).

**scatter** places `count` copies of a small closed solid (icosphere, regular tetrahedron or cube,
each with its vertices on the unit sphere) at uniform random points of a box, each stretched along
its own axes, turned by its own random rotation, scaled to its radius, all at once with array
arithmetic. Uniform random rotations follow

    Ken Shoemake (1992), "Uniform random rotations", Graphics Gems III, 124-132, Academic Press
    (a unit quaternion from three uniform numbers: (√(1-u1) sin 2πu2, √(1-u1) cos 2πu2,
    √u1 sin 2πu3, √u1 cos 2πu3)).
"""
import numpy as np

from tracer.scene.shapes import box, sphere

GOLDEN = np.uint64(0x9E3779B97F4A7C15)      # 2^64 / golden ratio, the SplitMix64 increment
MIX_1 = np.uint64(0xBF58476D1CE4E5B9)       # SplitMix64 finaliser constants (Steele et al. 2014)
MIX_2 = np.uint64(0x94D049BB133111EB)
TO_UNIT = 2.0 ** -53                        # 53 random bits to a double in [0, 1)
# 16 unit gradient directions, 22.5 degrees apart; the top 4 bits of a lattice point's hash pick one.
GRADIENT_DIRECTIONS = 16
_GRADIENT_ANGLES = np.arange(GRADIENT_DIRECTIONS) * (2.0 * np.pi / GRADIENT_DIRECTIONS)
_GRADIENT_X, _GRADIENT_Z = np.cos(_GRADIENT_ANGLES), np.sin(_GRADIENT_ANGLES)
# 2-D gradient noise with unit gradients lies within ±√2/2 (see the module docstring).
NOISE_BOUND_2D = np.sqrt(2.0) / 2.0
LACUNARITY = 2.0                            # frequency ratio of successive octaves (Musgrave 2003)
# Random streams of one seed: one per purpose, so that changing one parameter leaves the others alone.
STREAM_OCTAVE = 1
STREAM_POSITION = 2
STREAM_ROTATION = 3
STREAM_RADIUS = 4
STREAM_NOISE = 100                          # + octave: the gradient hash of each octave
PIECES = ("sphere", "tetrahedron", "box")
ROTATIONS = ("random", "about_y", "none")


def _mix64(z):
    """SplitMix64 finaliser (Steele et al. 2014) of a uint64 array: a bijective avalanche."""
    z = (z ^ (z >> np.uint64(30))) * MIX_1
    z = (z ^ (z >> np.uint64(27))) * MIX_2
    return z ^ (z >> np.uint64(31))


def _key(seed: int, stream: int) -> np.uint64:
    """The uint64 key of one random stream of a user seed (any int in [0, 2^63))."""
    # One-element arrays: numpy wraps array arithmetic modulo 2^64 silently (scalars would warn).
    base = np.array([int(seed) & 0xFFFFFFFFFFFFFFFF], dtype=np.uint64)
    return _mix64(base ^ _mix64(np.array([stream], dtype=np.uint64) * GOLDEN))[0]


def uniform(seed: int, stream: int, count: int, dimensions: int) -> np.ndarray:
    """(count, dimensions) float64 numbers in [0, 1); entry (i, d) is a hash of (seed, stream, i, d)."""
    counters = (np.arange(count, dtype=np.uint64)[:, None] * np.uint64(dimensions)
                + np.arange(dimensions, dtype=np.uint64)[None, :])
    bits = _mix64(_key(seed, stream) ^ _mix64((counters + np.uint64(1)) * GOLDEN))
    return (bits >> np.uint64(11)).astype(np.float64) * TO_UNIT


def fade(t: np.ndarray) -> np.ndarray:
    """Perlin's (2002) blending curve 6t^5 - 15t^4 + 10t^3 (Horner form)."""
    return t * t * t * (t * (t * 6.0 - 15.0) + 10.0)


def gradient_noise(x: np.ndarray, z: np.ndarray, key) -> np.ndarray:
    """2-D gradient noise (Perlin 1985, with the 2002 fade) at points (x, z) in lattice units.

    `x` and `z` broadcast together (e.g. (1, nx) and (nz, 1) give an (nz, nx) grid, hashing each
    column once); `key` is a uint64 seed. The result lies within ±NOISE_BOUND_2D and is 0 at integer
    points.
    """
    x_floor, z_floor = np.floor(x), np.floor(z)
    x_frac, z_frac = x - x_floor, z - z_floor
    # Negative lattice indices wrap (two's complement) onto distinct uint64 values for the hash.
    x_cell = x_floor.astype(np.int64).view(np.uint64)
    z_cell = z_floor.astype(np.int64).view(np.uint64)
    result = 0.0
    x_weight, z_weight = fade(x_frac), fade(z_frac)
    for dx in (0, 1):
        # The x half of the corner's hash, on the (broadcast-small) x array only.
        column_hash = _mix64(key ^ ((x_cell + np.uint64(dx)) * GOLDEN))
        ramp_x = x_frac - dx
        blend_x = x_weight if dx else 1.0 - x_weight
        for dz in (0, 1):
            corner_hash = _mix64(column_hash ^ ((z_cell + np.uint64(dz)) * MIX_1))
            direction = (corner_hash >> np.uint64(60)).astype(np.intp)
            # Perlin (1985): the corner's ramp g · (p - corner), weighted by the fade of each axis.
            ramp = _GRADIENT_X[direction] * ramp_x + _GRADIENT_Z[direction] * (z_frac - dz)
            result = result + ramp * (blend_x * (z_weight if dz else 1.0 - z_weight))
    return result


def fractal_noise(x: np.ndarray, z: np.ndarray, seed: int, octaves: int, roughness: float) -> np.ndarray:
    """fBm (Musgrave 2003): the sum over octaves k of roughness^k · noise(2^k p + offset_k), in [-1, 1]."""
    offsets = uniform(seed, STREAM_OCTAVE, octaves, 2) * 256.0
    total, amplitude_sum, amplitude, frequency = 0.0, 0.0, 1.0, 1.0
    for octave in range(octaves):
        key = _key(seed, STREAM_NOISE + octave)
        total = total + amplitude * gradient_noise(x * frequency + offsets[octave, 0],
                                                   z * frequency + offsets[octave, 1], key)
        amplitude_sum += amplitude
        amplitude *= roughness
        frequency *= LACUNARITY
    return total / (amplitude_sum * NOISE_BOUND_2D)


def terrain(size, resolution, height: float, feature_size: float, octaves: int, roughness: float,
            seed: int):
    """A heightfield over [-sx/2, sx/2] x [-sz/2, sz/2] with y = height · fBm(x, z), facing +Y.

    `resolution` = (nx, nz) cells; returns ((nx+1)(nz+1), 3) float64 vertices (row-major: z rows of x)
    and (2·nx·nz, 3) int64 faces, counter-clockwise seen from above.
    """
    size_x, size_z = (float(s) for s in size)
    cells_x, cells_z = (int(n) for n in resolution)
    # (i / n - 1/2) · size: exact end points, and the grid of 2n cells contains the grid of n cells.
    xs = (np.arange(cells_x + 1) / cells_x - 0.5) * size_x
    zs = (np.arange(cells_z + 1) / cells_z - 0.5) * size_z
    heights = height * fractal_noise(xs[None, :] / feature_size, zs[:, None] / feature_size,
                                     seed, octaves, roughness)
    vertices = np.empty(((cells_z + 1) * (cells_x + 1), 3), dtype=np.float64)
    vertices[:, 0] = np.broadcast_to(xs[None, :], heights.shape).ravel()
    vertices[:, 1] = heights.ravel()
    vertices[:, 2] = np.broadcast_to(zs[:, None], heights.shape).ravel()
    # Corners of cell (row, col): a at (col, row), b one step along +x, c one along +z, d along both.
    a = (np.arange(cells_z)[:, None] * (cells_x + 1) + np.arange(cells_x)[None, :]).ravel()
    b, c = a + 1, a + (cells_x + 1)
    d = c + 1
    # (a, c, b) and (b, c, d): (+z) x (+x) = +y, counter-clockwise seen from above.
    faces = np.empty((2 * a.size, 3), dtype=np.int64)
    faces[0::2, 0], faces[0::2, 1], faces[0::2, 2] = a, c, b
    faces[1::2, 0], faces[1::2, 1], faces[1::2, 2] = b, c, d
    return vertices, faces


def _tetrahedron():
    """The regular tetrahedron with its 4 vertices on the unit sphere, faces outward (common practice)."""
    vertices = np.array([[1, 1, 1], [1, -1, -1], [-1, 1, -1], [-1, -1, 1]], dtype=np.float64) / np.sqrt(3.0)
    faces = np.array([[0, 1, 2], [0, 3, 1], [0, 2, 3], [1, 3, 2]], dtype=np.int64)
    return vertices, faces


def piece_solid(piece: str, subdivisions: int):
    """The base solid of a scatter, circumscribed by the unit sphere: (V, 3) vertices, (F, 3) faces."""
    if piece == "sphere":
        return sphere(1.0, subdivisions)
    if piece == "tetrahedron":
        return _tetrahedron()
    if piece == "box":
        return box(np.full(3, 2.0 / np.sqrt(3.0)))  # half-diagonal 1
    raise ValueError(f"unknown piece {piece!r}; expected one of {PIECES}")


def piece_triangles(piece: str, subdivisions: int) -> int:
    """Triangles of one scatter piece: 20·4^s icosphere, 4 tetrahedron, 12 box."""
    return {"sphere": 20 * 4 ** subdivisions, "tetrahedron": 4, "box": 12}[piece]


def random_rotations(seed: int, count: int, rotation: str) -> np.ndarray:
    """(count, 3, 3) rotation matrices: uniform over all rotations (Shoemake 1992), about +Y, or none."""
    numbers = uniform(seed, STREAM_ROTATION, count, 3)
    if rotation == "none":
        return np.broadcast_to(np.eye(3), (count, 3, 3)).copy()
    if rotation == "about_y":
        angle = 2.0 * np.pi * numbers[:, 0]
        cos, sin = np.cos(angle), np.sin(angle)
        matrices = np.zeros((count, 3, 3))
        matrices[:, 0, 0], matrices[:, 0, 2], matrices[:, 1, 1] = cos, sin, 1.0
        matrices[:, 2, 0], matrices[:, 2, 2] = -sin, cos
        return matrices
    if rotation != "random":
        raise ValueError(f"unknown rotation {rotation!r}; expected one of {ROTATIONS}")
    u1, u2, u3 = numbers.T
    # Shoemake (1992): a uniformly distributed unit quaternion (x, y, z, w).
    x = np.sqrt(1.0 - u1) * np.sin(2.0 * np.pi * u2)
    y = np.sqrt(1.0 - u1) * np.cos(2.0 * np.pi * u2)
    z = np.sqrt(u1) * np.sin(2.0 * np.pi * u3)
    w = np.sqrt(u1) * np.cos(2.0 * np.pi * u3)
    # The rotation matrix of a unit quaternion (common practice).
    return np.stack([
        np.stack([1 - 2 * (y * y + z * z), 2 * (x * y - z * w), 2 * (x * z + y * w)], axis=1),
        np.stack([2 * (x * y + z * w), 1 - 2 * (x * x + z * z), 2 * (y * z - x * w)], axis=1),
        np.stack([2 * (x * z - y * w), 2 * (y * z + x * w), 1 - 2 * (x * x + y * y)], axis=1),
    ], axis=1)


def scatter(size, count: int, piece: str, subdivisions: int, radius: float, stretch, rotation: str,
            variation: float, seed: int):
    """`count` closed pieces at uniform random centres in the box [-size/2, size/2].

    Each piece is the unit-circumscribed `piece` solid, stretched along its own axes by `stretch`,
    turned by its rotation, scaled by radius · (1 - variation · u) with u uniform in [0, 1), and moved
    to its centre. Returns (count·V, 3) float64 vertices and (count·F, 3) int64 faces, pieces in order.
    """
    base_vertices, base_faces = piece_solid(piece, subdivisions)
    centres = (uniform(seed, STREAM_POSITION, count, 3) - 0.5) * np.asarray(size, dtype=np.float64)
    radii = radius * (1.0 - variation * uniform(seed, STREAM_RADIUS, count, 1)[:, 0])
    rotations = random_rotations(seed, count, rotation)
    with np.errstate(over="ignore", invalid="ignore"):  # overflow is reported by the caller's check
        # Per piece: rotation · diag(stretch) · radius, as one (count, 3, 3) linear map.
        linear = rotations * (np.asarray(stretch, dtype=np.float64)[None, None, :] * radii[:, None, None])
        vertices = np.einsum("nij,vj->nvi", linear, base_vertices) + centres[:, None, :]
    first_vertex = np.arange(count, dtype=np.int64) * base_vertices.shape[0]
    faces = base_faces[None, :, :] + first_vertex[:, None, None]
    return vertices.reshape(-1, 3), faces.reshape(-1, 3)

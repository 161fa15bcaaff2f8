"""Built-in shapes as triangle lists, and the object transform.

Every builder returns ``(vertices, faces)``: (V, 3) float64 positions in the shape's own frame, centred
on the origin, and (F, 3) int64 vertex indices ordered counter-clockwise seen from the front (the
right-hand rule gives the front normal). ``rect`` and ``disk`` face their ``normal``; ``box`` and
``sphere`` face outward.

The sphere is an icosphere: the regular icosahedron (vertices at the cyclic permutations of
(0, ±1, ±φ), φ the golden ratio; common practice) refined by the 1-to-4 triangle split of

    Charles Loop (1987), "Smooth Subdivision Surfaces Based on Triangles", M.S. thesis,
    Department of Mathematics, University of Utah.

We keep Loop's split (one new vertex per edge, four children per triangle) but not his smoothing
weights: each new edge midpoint is projected onto the sphere instead, so subdivision level n has
20·4^n triangles whose vertices all lie on the sphere (the mesh is inscribed, its area approaches
4πr² from below). Midpoints are shared between the two triangles of an edge by sorting the edge keys
(``np.unique``), which keeps a level-8 sphere (1.3 M triangles) well under a second.

Transforms follow INTERFACE.md: scale, then rotate about X, then Y, then Z (right-handed: a positive
angle turns counter-clockwise seen from the axis tip), then translate; scale and rotation act about
the shape's centre.
"""
import numpy as np

# A tangent closer than this (sine of the angle) to the normal is treated as parallel to it.
PARALLEL_SINE = 1e-6
# A triangle is degenerate when twice its area is at most this fraction of its longest edge squared,
# i.e. its smallest angle has a sine below ~1e-12: collinear to float64 rounding.
DEGENERATE_SINE = 1e-12


def unit(vector: np.ndarray) -> np.ndarray | None:
    """The (3,) vector scaled to length 1, or None when it has no direction (zero or not finite)."""
    vector = np.asarray(vector, dtype=np.float64)
    scale = np.max(np.abs(vector))
    if not np.isfinite(scale) or scale == 0.0:
        return None
    scaled = vector / scale  # rescale first so that tiny or huge vectors do not under/overflow
    return scaled / np.linalg.norm(scaled)


def project_tangent(normal: np.ndarray, tangent: np.ndarray) -> np.ndarray | None:
    """The unit part of `tangent` in the plane of unit `normal`; None if they are (nearly) parallel."""
    direction = unit(tangent)
    if direction is None:
        return None
    in_plane = direction - np.dot(direction, normal) * normal
    if np.linalg.norm(in_plane) <= PARALLEL_SINE:
        return None
    return in_plane / np.linalg.norm(in_plane)


def default_tangent(normal: np.ndarray) -> np.ndarray:
    """World +X projected into the plane of unit `normal`, or +Z when the normal lies along X."""
    tangent = project_tangent(normal, np.array([1.0, 0.0, 0.0]))
    if tangent is None:
        tangent = project_tangent(normal, np.array([0.0, 0.0, 1.0]))
    return tangent


def rect(width: float, height: float, normal: np.ndarray, tangent: np.ndarray):
    """Two triangles spanning `width` along unit `tangent` and `height` along cross(normal, tangent)."""
    bitangent = np.cross(normal, tangent)  # (tangent, bitangent, normal) is right-handed
    half_u = 0.5 * width * tangent
    half_v = 0.5 * height * bitangent
    # Corners in counter-clockwise order seen from the normal: tangent x bitangent = normal.
    vertices = np.array([-half_u - half_v, half_u - half_v, half_u + half_v, -half_u + half_v])
    faces = np.array([[0, 1, 2], [0, 2, 3]], dtype=np.int64)
    return vertices, faces


def box(size: np.ndarray):
    """An axis-aligned box of the given (3,) extents: 8 shared corners, 12 triangles facing outward."""
    half = 0.5 * np.asarray(size, dtype=np.float64)
    # Corner k has coordinate +half on axis a when bit a of k is set.
    bits = (np.arange(8)[:, None] >> np.arange(3)[None, :]) & 1
    vertices = np.where(bits == 1, half, -half)
    faces = []
    for axis in range(3):
        for sign in (-1, 1):
            normal = np.zeros(3)
            normal[axis] = sign
            tangent = np.zeros(3)
            tangent[(axis + 1) % 3] = 1.0
            # The corners of the face quad, in the counter-clockwise order of `rect` seen from outside.
            quad_corners, _ = rect(2.0, 2.0, normal, tangent)
            quad_corners = quad_corners + normal
            corner_ids = ((quad_corners > 0) * (1 << np.arange(3))).sum(axis=1)
            faces += [corner_ids[[0, 1, 2]], corner_ids[[0, 2, 3]]]
    return vertices, np.array(faces, dtype=np.int64)


def _icosahedron():
    """The 12 unit vertices and 20 outward faces of the regular icosahedron (common practice)."""
    phi = (1.0 + np.sqrt(5.0)) / 2.0
    vertices = np.array([
        [-1, phi, 0], [1, phi, 0], [-1, -phi, 0], [1, -phi, 0],
        [0, -1, phi], [0, 1, phi], [0, -1, -phi], [0, 1, -phi],
        [phi, 0, -1], [phi, 0, 1], [-phi, 0, -1], [-phi, 0, 1],
    ], dtype=np.float64)
    vertices /= np.linalg.norm(vertices, axis=1, keepdims=True)
    faces = np.array([
        [0, 11, 5], [0, 5, 1], [0, 1, 7], [0, 7, 10], [0, 10, 11],
        [1, 5, 9], [5, 11, 4], [11, 10, 2], [10, 7, 6], [7, 1, 8],
        [3, 9, 4], [3, 4, 2], [3, 2, 6], [3, 6, 8], [3, 8, 9],
        [4, 9, 5], [2, 4, 11], [6, 2, 10], [8, 6, 7], [9, 8, 1],
    ], dtype=np.int64)
    # Orient every face outward: for a convex solid around the origin the outward normal has a
    # positive dot product with the face centroid.
    v0, v1, v2 = vertices[faces[:, 0]], vertices[faces[:, 1]], vertices[faces[:, 2]]
    inward = np.einsum("ij,ij->i", np.cross(v1 - v0, v2 - v0), v0 + v1 + v2) < 0
    faces[inward] = faces[inward][:, ::-1]
    return vertices, faces


def _split_on_sphere(vertices: np.ndarray, faces: np.ndarray):
    """One 1-to-4 split (Loop 1987) with the new edge midpoints projected onto the unit sphere."""
    count = vertices.shape[0]
    corner_a, corner_b, corner_c = faces[:, 0], faces[:, 1], faces[:, 2]
    starts = np.concatenate([corner_a, corner_b, corner_c])
    ends = np.concatenate([corner_b, corner_c, corner_a])
    low, high = np.minimum(starts, ends), np.maximum(starts, ends)
    # One key per undirected edge; sorting the keys gives each shared edge one midpoint index.
    edge_keys, midpoint_of = np.unique(low * count + high, return_inverse=True)
    edge_low, edge_high = np.divmod(edge_keys, count)
    midpoints = vertices[edge_low] + vertices[edge_high]
    midpoints /= np.linalg.norm(midpoints, axis=1, keepdims=True)
    mid_ab, mid_bc, mid_ca = (count + midpoint_of).reshape(3, -1)
    # Children keep the parent's counter-clockwise order.
    children = np.stack([
        np.stack([corner_a, mid_ab, mid_ca], axis=1),
        np.stack([corner_b, mid_bc, mid_ab], axis=1),
        np.stack([corner_c, mid_ca, mid_bc], axis=1),
        np.stack([mid_ab, mid_bc, mid_ca], axis=1),
    ], axis=1).reshape(-1, 3)
    return np.concatenate([vertices, midpoints]), children


def sphere(radius: float, subdivisions: int):
    """An icosphere of 20·4^subdivisions outward triangles with every vertex at distance `radius`."""
    vertices, faces = _icosahedron()
    for _ in range(subdivisions):
        vertices, faces = _split_on_sphere(vertices, faces)
    return vertices * radius, faces


def disk(radius: float, normal: np.ndarray, tangent: np.ndarray, segments: int):
    """A fan of `segments` triangles around the centre, rim vertices on the circle, facing `normal`."""
    bitangent = np.cross(normal, tangent)
    angles = np.arange(segments) * (2.0 * np.pi / segments)
    # Increasing angle runs from tangent to bitangent: counter-clockwise seen from the normal.
    rim = radius * (np.cos(angles)[:, None] * tangent + np.sin(angles)[:, None] * bitangent)
    vertices = np.concatenate([np.zeros((1, 3)), rim])
    rim_ids = np.arange(1, segments + 1, dtype=np.int64)
    faces = np.stack([np.zeros(segments, dtype=np.int64), rim_ids, np.roll(rim_ids, -1)], axis=1)
    return vertices, faces


def _cos_sin_degrees(angle: float) -> tuple[float, float]:
    """cos and sin of an angle in degrees, exact at multiples of 90 so that right angles stay exact."""
    turned = float(angle) % 360.0
    exact = {0.0: (1.0, 0.0), 90.0: (0.0, 1.0), 180.0: (-1.0, 0.0), 270.0: (0.0, -1.0)}
    if turned in exact:
        return exact[turned]
    radians = np.radians(turned)
    return float(np.cos(radians)), float(np.sin(radians))


def rotation_matrix(degrees_xyz: np.ndarray) -> np.ndarray:
    """(3, 3) right-handed rotation about X, then Y, then Z (R = Rz Ry Rx acting on column vectors)."""
    (cx, sx), (cy, sy), (cz, sz) = (_cos_sin_degrees(a) for a in degrees_xyz)
    about_x = np.array([[1.0, 0.0, 0.0], [0.0, cx, -sx], [0.0, sx, cx]])
    about_y = np.array([[cy, 0.0, sy], [0.0, 1.0, 0.0], [-sy, 0.0, cy]])
    about_z = np.array([[cz, -sz, 0.0], [sz, cz, 0.0], [0.0, 0.0, 1.0]])
    return about_z @ about_y @ about_x


def transform(vertices: np.ndarray, scale: np.ndarray, rotate: np.ndarray, position: np.ndarray):
    """Scale, then rotate (degrees about X, Y, Z), then move the origin of `vertices` to `position`."""
    linear = rotation_matrix(rotate) * np.asarray(scale, dtype=np.float64)  # R @ diag(scale)
    world = np.empty_like(vertices, dtype=np.float64)
    # Three multiply-adds per row instead of a BLAS matrix product: no thread start-up for (V, 3) @ (3, 3).
    with np.errstate(over="ignore", invalid="ignore"):  # overflow is reported by the caller's check
        for row in range(3):
            world[:, row] = (vertices[:, 0] * linear[row, 0] + vertices[:, 1] * linear[row, 1]
                             + vertices[:, 2] * linear[row, 2] + position[row])
    return world


def drop_degenerate(vertices: np.ndarray, faces: np.ndarray):
    """Remove zero-area triangles; return the kept (F', 3) faces and how many were dropped."""
    # Per-coordinate rows and in-place products: a 1.3 M triangle sphere is checked in ~0.2 s.
    x, y, z = (np.ascontiguousarray(vertices[:, axis]) for axis in range(3))
    first, second, third = (np.ascontiguousarray(faces[:, corner]) for corner in range(3))
    x0, y0, z0 = x[first], y[first], z[first]
    ax, ay, az = x[second] - x0, y[second] - y0, z[second] - z0
    bx, by, bz = x[third] - x0, y[third] - y0, z[third] - z0
    # |a x b| = 2 * area (common practice); compared squared to avoid a square root per triangle.
    twice_area_squared = np.square(ay * bz - az * by)
    twice_area_squared += np.square(az * bx - ax * bz)
    twice_area_squared += np.square(ax * by - ay * bx)
    longest_squared = np.maximum(np.square(ax) + np.square(ay) + np.square(az),
                                 np.square(bx) + np.square(by) + np.square(bz))
    np.maximum(longest_squared, np.square(bx - ax) + np.square(by - ay) + np.square(bz - az),
               out=longest_squared)
    keep = twice_area_squared > np.square(DEGENERATE_SINE * longest_squared)
    dropped = int(faces.shape[0] - np.count_nonzero(keep))
    return (faces[keep] if dropped else faces), dropped

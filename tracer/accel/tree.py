"""The flat form every acceleration structure takes, so one set of kernels can trace through any of them.

A structure is a `Tree`: a few contiguous arrays linked by index. Node records are rows of W 32-bit
words, W depending on the kind (32 for the BVH and the kd-tree, 8 for brute's single record);
`nodes_f` and `nodes_i` are two (N, W) views of the same memory (float32 and int32), so a node's boxes
or split planes and its links sit in one record. What the words mean depends on `kind`:

- BVH (kind 1): 4-wide records of 32 words (128 bytes, aligned to 128 bytes: two whole cache lines),
  depth-first order (a record's children come after it), root = record 0, built by `tracer.accel.bvh`
  (a binary build collapsed to four children per record).
  Lane k (0..3) is one child: its box is f[8a + k] (lo) and f[8a + 4 + k] (hi) on axis a (x, y, z),
  so each of the six planes of the four boxes is a run of 4 float32 (structure of arrays: one vector
  load each); i[24 + k] is the child's record (inner child) or its first reference (leaf child);
  i[28 + k] is the leaf's count of references, 0 for an inner child, -1 for an unused lane (whose box
  is lo = +inf, hi = -inf, so no ray enters it).
- kd-tree (kind 2): treelet records of 32 words (128 bytes, aligned to 64 bytes: two whole cache
  lines), root = record 0, built by `tracer.accel.kdtree`. A treelet record holds up to four levels of
  the binary kd-tree: f[0..14] the split positions of its 15 inner positions in heap order (NaN where
  the position is not an inner node), i[15] their axes (2 bits each), i[16..31] the link words of the 16
  slots below the fourth level (a leaf met higher up covers a run of slots, the run's first slot
  holding it), so a ray decides four levels per record in one vector step; a leaf record has
  i[15] = -1, i[16] = first reference, i[17] = count. A link word is a record index, -1 for an empty
  leaf, or a small leaf packed into the word itself. The word-by-word layout is in the docstring of
  `tracer.accel.kdtree`. No cell boxes are stored: a cell is `bounds` cut by the splits on its path.
- brute (kind 0): one 8-word record that the kernels do not read (they test every reference in
  order): f[0..5] the scene box, i[6] = 0 the first reference, i[7] the count of references (every
  triangle). `node_records` allocates it.

`refs[k]` is the scene triangle id of reference k; `leaf_tris[k]` holds that triangle's vertices
(v0, v1, v2 as 9 float32), copied in reference order so a leaf reads contiguous memory. A kd-tree may
reference one triangle several times (a triangle straddling a split is referenced on both sides).
"""
from typing import NamedTuple

import numpy as np

BRUTE, BVH, KDTREE = 0, 1, 2
STACK_SIZE = 320        # entries of the explicit traversal stack and the kd-tree's mailbox (see
                        # tracer.accel._kdtraverse); a tree too deep for it is refused


class Tree(NamedTuple):
    kind: int                   # BRUTE, BVH or KDTREE
    nodes_f: np.ndarray         # (N, W) float32 view of the node records (W words: see above)
    nodes_i: np.ndarray         # (N, W) int32 view of the same memory
    refs: np.ndarray            # (R,) int32 triangle id of each reference
    leaf_tris: np.ndarray       # (R, 9) float32 vertices of each reference's triangle
    bounds: np.ndarray          # (6,) float32 lo, hi of the whole scene


def node_records(count: int, words: int = 8, align: int = 64) -> tuple[np.ndarray, np.ndarray]:
    """`count` (at least 1) zeroed node records of `words` 32-bit words in one block starting on an
    `align`-byte boundary, as (float32, int32) views. numpy's own allocations are only 16-byte aligned,
    so a record would straddle one more cache line than it fills."""
    rows = max(count, 1)
    raw = np.zeros(rows * words * 4 + align, np.uint8)
    offset = (-raw.ctypes.data) % align
    records = raw[offset:offset + rows * words * 4].view(np.int32).reshape(rows, words)
    return records.view(np.float32), records


def leaf_triangles(vertices: np.ndarray, faces: np.ndarray, refs: np.ndarray) -> np.ndarray:
    """(R, 9) float32 vertices of the referenced triangles, in reference order."""
    tri = vertices[faces[refs]].astype(np.float32)     # (R, 3, 3)
    return np.ascontiguousarray(tri.reshape(-1, 9))


def scene_bounds(vertices: np.ndarray) -> np.ndarray:
    if len(vertices) == 0:
        return np.zeros(6, dtype=np.float32)
    return np.concatenate([vertices.min(axis=0), vertices.max(axis=0)]).astype(np.float32)

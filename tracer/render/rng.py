"""Counter-based random numbers: every value is a pure function of (seed, pixel, sample, dimension).

A render therefore does not depend on how pixels are spread over threads, and any sample of any pixel
can be recomputed alone (resume, comparisons between structures). The mixing function is the 64-bit
finaliser of SplitMix64: Steele, Lea & Flood (2014), "Fast splittable pseudorandom number generators",
OOPSLA '14, 453-472.
"""
import numba
import numpy as np

GOLDEN = np.uint64(0x9E3779B97F4A7C15)      # 2^64 / golden ratio, the SplitMix64 increment
M1 = np.uint64(0xBF58476D1CE4E5B9)
M2 = np.uint64(0x94D049BB133111EB)
TO_UNIT = 1.0 / 9007199254740992.0          # 2^-53: 53 random bits to a double in [0, 1)


@numba.njit(cache=True, inline="always")
def mix64(z):
    """SplitMix64 finaliser (Steele et al. 2014): a bijective avalanche of a uint64."""
    z = (z ^ (z >> np.uint64(30))) * M1
    z = (z ^ (z >> np.uint64(27))) * M2
    return z ^ (z >> np.uint64(31))


def seed_key(seed: int) -> np.uint64:
    """The uint64 key of a user seed (any Python int)."""
    return mix64(np.uint64(int(seed) & 0xFFFFFFFFFFFFFFFF) ^ np.uint64(0x5EED5EED5EED5EED))


@numba.njit(cache=True, inline="always")
def path_key(key, pixel, sample):
    """The key of one sample of one pixel (pixel = row * width + col)."""
    return mix64(key ^ mix64(np.uint64(pixel) * GOLDEN + np.uint64(sample)))


@numba.njit(cache=True, inline="always")
def uniform(path, dim):
    """A uniform double in [0, 1) for random dimension `dim` of the path with key `path`."""
    z = mix64(path + np.uint64(dim + 1) * GOLDEN)
    return np.float64(z >> np.uint64(11)) * TO_UNIT

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
    # np.uint64 again: mix64 called from Python returns a Python int, and a key above 2**63 would make
    # numba compile a second (int64-typed) kernel that later calls pick wrongly.
    return np.uint64(mix64(np.uint64(int(seed) & 0xFFFFFFFFFFFFFFFF) ^ np.uint64(0x5EED5EED5EED5EED)))


@numba.njit(cache=True, inline="always")
def path_key(key, pixel, sample):
    """The key of one sample of one pixel (pixel = row * width + col)."""
    return mix64(key ^ mix64(np.uint64(pixel) * GOLDEN + np.uint64(sample)))


@numba.njit(cache=True, inline="always")
def uniform(path, dim):
    """A uniform double in [0, 1) for random dimension `dim` of the path with key `path`."""
    z = mix64(path + np.uint64(dim + 1) * GOLDEN)
    return np.float64(z >> np.uint64(11)) * TO_UNIT


# --- Owen-scrambled Sobol' points ------------------------------------------------------------------
# Burley (2020), "Practical Hash-based Owen Scrambling", Journal of Computer Graphics Techniques 9(4):
# a 4D Sobol' point per (pixel, sample, group) with hash-based nested uniform (Owen) scrambling and a
# scrambled ("shuffled") sample index; higher dimensions are padded with independently scrambled 4D
# groups (section 4). Sobol' direction numbers from Joe & Kuo (2008), "Constructing Sobol sequences with
# better two-dimensional projections", SIAM J. Sci. Comput. 30(5) (first four dimensions; from memory,
# checked against scipy.stats.qmc.Sobol in the tests).
_JOE_KUO = ((1, 0, (1,)), (2, 1, (1, 3)), (3, 1, (1, 3, 1)))     # (degree s, a, m) of dimensions 2-4
MASK32 = np.uint64(0xFFFFFFFF)
TO_UNIT32 = 1.0 / 4294967296.0


def _direction_numbers() -> np.ndarray:
    table = np.zeros((4, 32), np.uint64)
    table[0] = [1 << (31 - i) for i in range(32)]                  # van der Corput
    for dim, (s, a, m) in enumerate(_JOE_KUO, start=1):
        v = [0] * 32
        for i in range(s):
            v[i] = m[i] << (31 - i)
        for i in range(s, 32):
            x = v[i - s] ^ (v[i - s] >> s)
            for k in range(1, s):
                x ^= ((a >> (s - 1 - k)) & 1) * v[i - k]
            v[i] = x
        table[dim] = v
    return table


SOBOL_DIRECTIONS = _direction_numbers()


@numba.njit(cache=True, inline="always")
def _reverse_bits32(x):
    x = ((x >> np.uint64(1)) & np.uint64(0x55555555)) | ((x & np.uint64(0x55555555)) << np.uint64(1))
    x = ((x >> np.uint64(2)) & np.uint64(0x33333333)) | ((x & np.uint64(0x33333333)) << np.uint64(2))
    x = ((x >> np.uint64(4)) & np.uint64(0x0F0F0F0F)) | ((x & np.uint64(0x0F0F0F0F)) << np.uint64(4))
    x = ((x >> np.uint64(8)) & np.uint64(0x00FF00FF)) | ((x & np.uint64(0x00FF00FF)) << np.uint64(8))
    return ((x >> np.uint64(16)) | (x << np.uint64(16))) & MASK32


@numba.njit(cache=True, inline="always")
def _laine_karras(x, seed):
    """Burley 2020, Listing 2: a hash that only lets bits flow towards higher bits (after Laine & Karras)."""
    x = (x + seed) & MASK32
    x ^= (x * np.uint64(0x6C50B47C)) & MASK32
    x ^= (x * np.uint64(0xB82F1E52)) & MASK32
    x ^= (x * np.uint64(0xC7AFE638)) & MASK32
    x ^= (x * np.uint64(0x8D22F6E6)) & MASK32
    return x


@numba.njit(cache=True, inline="always")
def _owen_scramble(x, seed):
    """Nested uniform scrambling of a 32-bit fraction (Burley 2020, Listing 3)."""
    return _reverse_bits32(_laine_karras(_reverse_bits32(x), seed))


@numba.njit(cache=True, inline="always")
def _sobol(index, dim):
    x = np.uint64(0)
    bit = 0
    while index != np.uint64(0) and bit < 32:
        if index & np.uint64(1):
            x ^= SOBOL_DIRECTIONS[dim, bit]
        index >>= np.uint64(1)
        bit += 1
    return x


@numba.njit(cache=True)
def scrambled_sobol4(pixel, sample, group):
    """Burley 2020, Listing 4 (shuffled, scrambled 4D Sobol'): point `sample` of the sequence for this
    pixel key and dimension group. Returns four doubles in [0, 1)."""
    seed = mix64(pixel ^ mix64(np.uint64(group) * GOLDEN)) & MASK32
    index = _owen_scramble(np.uint64(sample) & MASK32, seed)
    u0 = _owen_scramble(_sobol(index, 0), mix64(seed + GOLDEN) & MASK32)
    u1 = _owen_scramble(_sobol(index, 1), mix64(seed + np.uint64(2) * GOLDEN) & MASK32)
    u2 = _owen_scramble(_sobol(index, 2), mix64(seed + np.uint64(3) * GOLDEN) & MASK32)
    u3 = _owen_scramble(_sobol(index, 3), mix64(seed + np.uint64(4) * GOLDEN) & MASK32)
    return (np.float64(u0) * TO_UNIT32, np.float64(u1) * TO_UNIT32, np.float64(u2) * TO_UNIT32,
            np.float64(u3) * TO_UNIT32)


@numba.njit(cache=True, inline="always")
def pixel_key(key, pixel):
    """The key of one pixel's sequence (every sample of the pixel shares it)."""
    return mix64(key ^ mix64(np.uint64(pixel) * GOLDEN + np.uint64(0x9E37)))

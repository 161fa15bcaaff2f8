"""Ward Larson's histogram adjustment with the linear ceiling.

Ward Larson, G., Rushmeier, H., Piatko, C. (1997). "A Visibility Matching Tone Reproduction Operator
for High Dynamic Range Scenes". IEEE Transactions on Visualization and Computer Graphics 3(4),
291-306. doi:10.1109/2945.646233.

World brightness B = log10(L) is histogrammed over the image's range [Bmin, Bmax]; display brightness
follows the cumulative distribution P of that histogram:

    log10(Ld) = log10(Ldmin) + (log10(Ldmax) - log10(Ldmin)) * P(Bw)

Naive histogram equalisation exaggerates contrast in well-populated ranges. The paper's linear
ceiling forbids it: the mapping may never be steeper than a linear one, dLd/dLw <= Ld/Lw, i.e. a
slope of at most 1 in log-log space, which caps every bin at

    f(b) <= ceiling = T * db / (log10(Ldmax) - log10(Ldmin)),   T = the sum of the (capped) counts.

The paper finds the cap by repeated trimming (stopping when the trimmings fall below a tolerance);
`linear_ceiling` solves the same fixed point exactly, so the bound holds without tolerance. When the
scene range already fits the display the mapping is linear (the paper's fallback), white at the
brightest pixel; when trimming would remove every count (a few isolated clusters), we fall back to a
straight line in log-log space through the whole range, which also respects the ceiling.

Departures: the histogram is built from every pixel of positive luminance rather than from a
1-degree foveal image, and the human-visibility ceiling (the paper's second variant) is not offered.
The output is Ld / Ldmax in [1 / display_range, 1]; zero luminance stays black. Only luminance
ratios matter, so exposure has no effect on this operator.
"""

import numpy as np

from .exposure import luminance, scale_by_luminance

DEFAULT_BINS = 100  # Ward Larson et al. 1997 use about 100 histogram bins (from memory)
DEFAULT_DISPLAY_RANGE = 100.0  # Ldmax / Ldmin of a typical display, 1 to 100 cd/m^2 (from memory)


def linear_ceiling(counts: np.ndarray, bin_width: float, display_log_range: float) -> float:
    """The largest cap c with c = k * sum(min(counts, c)), k = bin_width / display_log_range.

    That fixed point is where the paper's trimming iteration converges (from the start c = k T it
    only decreases). Returns 0.0 when the only fixed point is 0 (nothing can be kept).
    """
    k = bin_width / display_log_range
    ordered = np.sort(np.asarray(counts, dtype=np.float64))
    n = len(ordered)
    sums = np.concatenate(([0.0], np.cumsum(ordered)))  # sums[j] = the j smallest counts
    # With j bins under the cap and n - j trimmed to it: c = k (sums[j] + (n - j) c).
    for kept in range(n, -1, -1):
        denominator = 1.0 - k * (n - kept)
        if denominator <= 0.0:
            break
        cap = k * sums[kept] / denominator
        lower = ordered[kept - 1] if kept > 0 else 0.0
        upper = ordered[kept] if kept < n else np.inf
        if lower <= cap <= upper:
            return float(cap)
    return 0.0


def histogram_brightness_map(
    world_log: np.ndarray, bins: int = DEFAULT_BINS, display_range: float = DEFAULT_DISPLAY_RANGE
) -> np.ndarray:
    """log10(Ld / Ldmax) for world brightnesses `world_log` = log10(Lw), any shape (finite values)."""
    if bins < 1:
        raise ValueError(f"bins must be at least 1, got {bins}")
    if not display_range > 1.0:
        raise ValueError(f"display_range must be above 1, got {display_range}")
    world_log = np.asarray(world_log, dtype=np.float64)
    display_log_range = float(np.log10(display_range))
    low = float(world_log.min())
    high = float(world_log.max())
    if high - low <= display_log_range:
        return world_log - high  # the scene fits the display: linear, brightest pixel white
    bin_width = (high - low) / bins
    position = (world_log - low) / bin_width
    index = np.clip(position.astype(np.int64), 0, bins - 1)
    counts = np.bincount(index.ravel(), minlength=bins).astype(np.float64)
    cap = linear_ceiling(counts, bin_width, display_log_range)
    if cap <= 0.0:
        # Straight line through the whole range: slope display_log_range / (high - low) < 1.
        return (world_log - high) * (display_log_range / (high - low))
    kept = np.minimum(counts, cap)
    total = kept.sum()
    cumulative = np.concatenate(([0.0], np.cumsum(kept))) / total
    within = position - index  # linear inside a bin keeps the mapping continuous and monotonic
    probability = cumulative[index] + within * (kept[index] / total)
    return display_log_range * (probability - 1.0)  # log Ldmin + range * P, relative to Ldmax


def histogram(
    radiance: np.ndarray, bins: int = DEFAULT_BINS, display_range: float = DEFAULT_DISPLAY_RANGE,
    saturation: float = 1.0,
) -> np.ndarray:
    """Map (H, W, 3) linear radiance to [0, 1] by histogram adjustment with the linear ceiling."""
    rgb = np.ascontiguousarray(radiance, dtype=np.float64)
    if rgb.ndim != 3 or rgb.shape[2] != 3:
        raise ValueError(f"radiance must be (H, W, 3), got {rgb.shape}")
    y = luminance(rgb)
    lit = y > 0.0
    display_y = np.zeros_like(y)
    if lit.any():
        display_y[lit] = 10.0 ** histogram_brightness_map(np.log10(y[lit]), bins, display_range)
    return scale_by_luminance(rgb, y, display_y, saturation)

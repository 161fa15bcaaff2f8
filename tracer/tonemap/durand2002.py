"""Durand & Dorsey's local contrast reduction with a bilateral filter on log luminance.

Durand, F., Dorsey, J. (2002). "Fast Bilateral Filtering for the Display of High-Dynamic-Range
Images". ACM Transactions on Graphics 21(3), 257-266 (Proc. SIGGRAPH 2002).
doi:10.1145/566654.566574.

The log10 luminance is split into a base layer (its bilateral filter: Gaussian in space, sigma_s =
2% of the image size, and in range, sigma_r = 0.4 in log10 units, the paper's values) and a detail
layer (log luminance minus base). Only the base is compressed, by the factor that brings its range
to the target contrast (5:1 by default, as in the paper), and offset so the brightest base is white:

    log Ld = (base - max(base)) * log10(contrast) / (max(base) - min(base)) + detail

The bilateral filter is computed on a bilateral grid, the signal-processing approximation of

    Paris, S., Durand, F. (2009). "A Fast Approximation of the Bilateral Filter using a Signal
    Processing Approach". International Journal of Computer Vision 81(1), 24-52.
    doi:10.1007/s11263-007-0110-8 (first in ECCV 2006).

(x, y, log luminance) is sampled at `CELLS_PER_SIGMA` cells per sigma, pixels are splatted into the
grid with trilinear weights, the grid (values and weights, homogeneous coordinates) is blurred by a
separable Gaussian and read back by trilinear interpolation. Cost: one pass over the pixels each way,
independent of sigma_s.

Departures: BT.709 luminance instead of the paper's (20 R + 40 G + B) / 61; when the base range is
already below the target contrast it is left alone rather than expanded; pixels of zero luminance
take no part in the filter and stay black. The result does not depend on a global scale of the
radiance (the brightest base always maps to white), so exposure has no effect on this operator.
"""

import math

import numba
import numpy as np

from .exposure import luminance, scale_by_luminance

DEFAULT_CONTRAST = 5.0  # Durand & Dorsey 2002: target base contrast of 5 (from memory)
SPATIAL_SIGMA_FRACTION = 0.02  # Durand & Dorsey 2002: sigma_s = 2% of the image size
RANGE_SIGMA = 0.4  # Durand & Dorsey 2002: sigma_r = 0.4 in log10 luminance
CELLS_PER_SIGMA = 2  # grid cells per sigma; Paris & Durand use 1, 2 halves the approximation error
GAUSSIAN_TRUNCATION = 3.0  # blur taps out to 3 sigma (common practice)
# Luminances more than 12 decades below the brightest pixel are treated as black: they carry no
# visible signal and would only stretch the grid's range axis.
DARKEST_DECADES = 12.0


@numba.njit(cache=True, error_model="numpy")
def _splat_grid(log_y, weight, cell_xy, range_min, cell_range, pad, grid):
    # Serial: neighbouring pixels write to the same cells.
    for row in range(log_y.shape[0]):
        gy = row / cell_xy + pad
        y0 = int(math.floor(gy))
        fy = gy - y0
        for col in range(log_y.shape[1]):
            w = weight[row, col]
            if w == 0.0:
                continue
            value = log_y[row, col]
            gx = col / cell_xy + pad
            gr = (value - range_min) / cell_range + pad
            x0 = int(math.floor(gx))
            r0 = int(math.floor(gr))
            fx = gx - x0
            fr = gr - r0
            for dy in range(2):
                wy = fy if dy == 1 else 1.0 - fy
                for dx in range(2):
                    wx = fx if dx == 1 else 1.0 - fx
                    for dr in range(2):
                        wr = fr if dr == 1 else 1.0 - fr
                        cell_weight = w * wy * wx * wr
                        grid[0, y0 + dy, x0 + dx, r0 + dr] += cell_weight * value
                        grid[1, y0 + dy, x0 + dx, r0 + dr] += cell_weight


@numba.njit(parallel=True, cache=True, error_model="numpy")
def _slice_grid(log_y, grid, cell_xy, range_min, cell_range, pad, out):
    for row in numba.prange(log_y.shape[0]):
        gy = row / cell_xy + pad
        y0 = int(math.floor(gy))
        fy = gy - y0
        for col in range(log_y.shape[1]):
            value = log_y[row, col]
            gx = col / cell_xy + pad
            gr = (value - range_min) / cell_range + pad
            x0 = int(math.floor(gx))
            r0 = int(math.floor(gr))
            fx = gx - x0
            fr = gr - r0
            total = 0.0
            total_weight = 0.0
            for dy in range(2):
                wy = fy if dy == 1 else 1.0 - fy
                for dx in range(2):
                    wx = fx if dx == 1 else 1.0 - fx
                    for dr in range(2):
                        wr = fr if dr == 1 else 1.0 - fr
                        cell_weight = wy * wx * wr
                        total += cell_weight * grid[0, y0 + dy, x0 + dx, r0 + dr]
                        total_weight += cell_weight * grid[1, y0 + dy, x0 + dx, r0 + dr]
            # Homogeneous division (Paris & Durand, eq. for the normalised bilateral filter); a pixel
            # with no weighted neighbours keeps its own value.
            out[row, col] = total / total_weight if total_weight > 1e-12 else value


def _blur_axis(grid: np.ndarray, axis: int, taps: np.ndarray) -> np.ndarray:
    """Convolve along `axis` with the symmetric kernel `taps` (length 2k+1), zero outside."""
    radius = len(taps) // 2
    out = taps[radius] * grid
    size = grid.shape[axis]
    for offset in range(1, min(radius, size - 1) + 1):
        lead = [slice(None)] * grid.ndim
        lag = [slice(None)] * grid.ndim
        lead[axis] = slice(offset, None)
        lag[axis] = slice(None, size - offset)
        out[tuple(lead)] += taps[radius + offset] * grid[tuple(lag)]
        out[tuple(lag)] += taps[radius - offset] * grid[tuple(lead)]
    return out


def bilateral_log_base(
    log_y: np.ndarray, weight: np.ndarray, sigma_spatial: float, sigma_range: float
) -> np.ndarray:
    """Bilateral filter of an (H, W) float64 signal, by the bilateral grid.

    base(p) = sum_q w(q) G_s(|p - q|) G_r(|I(p) - I(q)|) I(q) / sum_q w(q) G_s G_r, with Gaussians of
    standard deviation `sigma_spatial` (pixels) and `sigma_range` (units of the signal); `weight`
    (H, W) is 1 for pixels that take part and 0 for pixels to ignore.
    """
    log_y = np.ascontiguousarray(log_y, dtype=np.float64)
    weight = np.ascontiguousarray(weight, dtype=np.float64)
    if log_y.ndim != 2 or weight.shape != log_y.shape:
        raise ValueError(f"signal and weight must be matching (H, W) arrays: {log_y.shape}, {weight.shape}")
    if not (sigma_spatial > 0.0 and sigma_range > 0.0):
        raise ValueError("sigma_spatial and sigma_range must be positive")
    height, width = log_y.shape
    used = weight > 0.0
    if not used.any():
        return log_y.copy()
    range_min = float(log_y[used].min())
    range_max = float(log_y[used].max())
    cell_xy = sigma_spatial / CELLS_PER_SIGMA
    cell_range = sigma_range / CELLS_PER_SIGMA
    radius = int(math.ceil(GAUSSIAN_TRUNCATION * CELLS_PER_SIGMA))
    offsets = np.arange(-radius, radius + 1, dtype=np.float64)
    taps = np.exp(-0.5 * (offsets / CELLS_PER_SIGMA) ** 2)  # Gaussian of sigma = CELLS_PER_SIGMA cells
    pad = radius + 1  # room for the blur and for trilinear neighbours at the far edge
    shape = (
        2,
        int(math.floor((height - 1) / cell_xy)) + 2 * pad + 2,
        int(math.floor((width - 1) / cell_xy)) + 2 * pad + 2,
        int(math.floor((range_max - range_min) / cell_range)) + 2 * pad + 2,
    )
    grid = np.zeros(shape, dtype=np.float64)
    # Pixels outside the used range (ignored ones) are clamped into it so the slice stays in bounds.
    clamped = np.clip(log_y, range_min, range_max)
    _splat_grid(clamped, weight, cell_xy, range_min, cell_range, pad, grid)
    for axis in (1, 2, 3):
        grid = _blur_axis(grid, axis, taps)
    base = np.empty_like(log_y)
    _slice_grid(clamped, grid, cell_xy, range_min, cell_range, pad, base)
    return base


def durand_luminance(
    y: np.ndarray, contrast: float = DEFAULT_CONTRAST, sigma_spatial: float | None = None,
    sigma_range: float = RANGE_SIGMA,
) -> np.ndarray:
    """Display luminance (H, W) for scene luminance `y` (H, W), before any clipping.

    The brightest base maps to 1; detail above it gives values over 1, which the caller clips.
    `sigma_spatial` defaults to 2% of the larger image side, in pixels.
    """
    y = np.asarray(y, dtype=np.float64)
    if y.ndim != 2:
        raise ValueError(f"luminance must be (H, W), got {y.shape}")
    if not contrast > 1.0:
        raise ValueError(f"contrast must be above 1, got {contrast}")
    if sigma_spatial is None:
        sigma_spatial = SPATIAL_SIGMA_FRACTION * max(y.shape)
    peak = float(np.max(y, initial=0.0))
    if peak <= 0.0:
        return np.zeros_like(y)
    floor = peak * 10.0 ** -DARKEST_DECADES
    used = y > floor
    log_y = np.log10(np.maximum(y, floor))
    base = bilateral_log_base(log_y, used.astype(np.float64), max(float(sigma_spatial), 0.5), sigma_range)
    detail = log_y - base
    base_max = float(base[used].max())
    base_min = float(base[used].min())
    compression = 1.0  # a base already within the target contrast is left alone
    if base_max - base_min > np.log10(contrast):
        compression = np.log10(contrast) / (base_max - base_min)
    # Durand & Dorsey 2002: compress the base only, brightest base at 1 (log 0), add the detail back.
    return np.where(used, 10.0 ** ((base - base_max) * compression + detail), 0.0)


def durand(
    radiance: np.ndarray, contrast: float = DEFAULT_CONTRAST, sigma_spatial: float | None = None,
    sigma_range: float = RANGE_SIGMA, saturation: float = 1.0,
) -> np.ndarray:
    """Map (H, W, 3) linear radiance to [0, 1] by base/detail decomposition (Durand & Dorsey 2002).

    `contrast` is the target ratio between the brightest and darkest base luminance; `sigma_spatial`
    defaults to 2% of the larger image side, in pixels. Returns (H, W, 3) float64.
    """
    rgb = np.ascontiguousarray(radiance, dtype=np.float64)
    if rgb.ndim != 3 or rgb.shape[2] != 3:
        raise ValueError(f"radiance must be (H, W, 3), got {rgb.shape}")
    y = luminance(rgb)
    display_y = durand_luminance(y, contrast, sigma_spatial, sigma_range)
    return scale_by_luminance(rgb, y, display_y, saturation)

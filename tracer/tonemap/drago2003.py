"""Drago's adaptive logarithmic mapping.

Drago, F., Myszkowski, K., Annen, T., Chiba, N. (2003). "Adaptive Logarithmic Mapping For
Displaying High Contrast Scenes". Computer Graphics Forum 22(3), 419-426 (Proc. Eurographics 2003).
doi:10.1111/1467-8659.00689.

Eq. 4 of the paper:

    Ld = (Ldmax * 0.01 / log10(Lwmax + 1)) * ln(Lw + 1) / ln(2 + 8 (Lw / Lwmax)^(ln(b) / ln(0.5)))

with Lw the world luminance after exposure, Lwmax its maximum, b the bias (0.85 recommended by the
paper; 0.7-0.9 is its useful range) and Ldmax the display's maximum luminance (100 cd/m^2, so that
Ldmax * 0.01 = 1 and Ld is the display value in [0, 1]: Lw = Lwmax gives exactly 1).

Departures from the paper: the world luminance is scaled by our automatic exposure (log-average to
the key, Reinhard 2002) rather than divided by the world adaptation luminance; the paper's own
gamma correction is replaced by the sRGB encoding applied afterwards; colour is carried
over by scaling R, G, B with Ld / Y on BT.709 luminance.
"""

import numpy as np

from .exposure import luminance, scale_by_luminance

DEFAULT_BIAS = 0.85  # the value Drago et al. 2003 recommend (from memory)
DISPLAY_MAX_LUMINANCE = 100.0  # cd/m^2, the paper's reference display (Ldmax * 0.01 = 1)


def drago_luminance(
    world: np.ndarray, world_max: float, bias: float = DEFAULT_BIAS,
    display_max: float = DISPLAY_MAX_LUMINANCE,
) -> np.ndarray:
    """Drago 2003, eq. 4: display luminance for world luminance `world` (any shape, >= 0)."""
    if not 0.0 < bias <= 1.0:
        raise ValueError(f"bias must be in (0, 1], got {bias}")
    if not (np.isfinite(world_max) and world_max > 0.0):
        raise ValueError(f"the maximum world luminance must be positive, got {world_max}")
    world = np.asarray(world, dtype=np.float64)
    exponent = np.log(bias) / np.log(0.5)  # the bias power function t^(ln b / ln 0.5)
    scale = display_max * 0.01 / np.log10(world_max + 1.0)
    relative = np.minimum(world / world_max, 1.0)  # values above the white point saturate at 1
    return scale * np.log1p(world) / np.log(2.0 + 8.0 * relative ** exponent)  # eq. 4


def drago(
    radiance: np.ndarray, bias: float = DEFAULT_BIAS, white: float | None = None, saturation: float = 1.0
) -> np.ndarray:
    """Map (H, W, 3) exposed linear radiance to [0, 1] by Drago's adaptive logarithm.

    `white` is Lwmax, the luminance shown as white (default: the image maximum). Returns float64.
    """
    rgb = np.ascontiguousarray(radiance, dtype=np.float64)
    if rgb.ndim != 3 or rgb.shape[2] != 3:
        raise ValueError(f"radiance must be (H, W, 3), got {rgb.shape}")
    y = luminance(rgb)
    if white is None:
        peak = float(np.max(y, initial=0.0))
        white = peak if peak > 0.0 else 1.0  # an all-black image stays black whatever Lwmax is
    display_y = drago_luminance(y, float(white), bias)
    return scale_by_luminance(rgb, y, display_y, saturation)

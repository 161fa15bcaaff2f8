"""Reinhard's global photographic operator with a white point.

Reinhard, E., Stark, M., Shirley, P., Ferwerda, J. (2002). "Photographic Tone Reproduction for
Digital Images". ACM Transactions on Graphics 21(3), 267-276 (Proc. SIGGRAPH 2002).
doi:10.1145/566654.566575.

Eq. 4: Ld = L (1 + L / L_white^2) / (1 + L), with L the luminance after the key scaling of eq. 2
(done by `tracer.tonemap.tonemap`) and L_white the smallest luminance mapped to pure white. The paper
works on luminance only; colour is carried over by scaling R, G, B with Ld / Y (common practice),
on BT.709 luminance, and a channel that ends above 1 is clipped to 1.
"""

import numba
import numpy as np

from .exposure import luminance


@numba.njit(parallel=True, cache=True, error_model="numpy")
def _reinhard_rows(rgb, white, saturation, out):
    for row in numba.prange(rgb.shape[0]):
        for col in range(rgb.shape[1]):
            r = rgb[row, col, 0]
            g = rgb[row, col, 1]
            b = rgb[row, col, 2]
            y = 0.2126 * r + 0.7152 * g + 0.0722 * b  # ITU-R BT.709 luminance
            for channel in range(3):
                value = 0.0  # Y = 0 maps to black
                if y > 0.0:
                    display_y = y * (1.0 + y / (white * white)) / (1.0 + y)  # eq. 4
                    if saturation == 1.0:
                        value = rgb[row, col, channel] * (display_y / y)
                    else:
                        value = display_y * (rgb[row, col, channel] / y) ** saturation
                out[row, col, channel] = min(max(value, 0.0), 1.0)


def reinhard(radiance: np.ndarray, white: float | None = None, saturation: float = 1.0) -> np.ndarray:
    """Map (H, W, 3) exposed linear radiance to display range [0, 1]; `white` maps to 1.

    `white` defaults to the largest luminance in the image (so nothing burns out but pure colours
    whose channels exceed 1). Returns (H, W, 3) float64.
    """
    rgb = np.ascontiguousarray(radiance, dtype=np.float64)
    if rgb.ndim != 3 or rgb.shape[2] != 3:
        raise ValueError(f"radiance must be (H, W, 3), got {rgb.shape}")
    if white is None:
        peak = float(np.max(luminance(rgb), initial=0.0))
        white = peak if peak > 0.0 else 1.0  # an all-black image: any white point gives black
    if not (np.isfinite(white) and white > 0.0):
        raise ValueError(f"white must be a positive luminance, got {white}")
    if not saturation > 0.0:
        raise ValueError(f"saturation must be positive, got {saturation}")
    out = np.empty_like(rgb)
    _reinhard_rows(rgb, float(white), float(saturation), out)
    return out

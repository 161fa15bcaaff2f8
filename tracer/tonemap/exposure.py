"""Scene exposure: BT.709 luminance, the log-average luminance and the mapping to a key value.

References
----------
- Reinhard, E., Stark, M., Shirley, P., Ferwerda, J. (2002). "Photographic Tone Reproduction for
  Digital Images". ACM Transactions on Graphics 21(3), 267-276 (Proc. SIGGRAPH 2002).
  doi:10.1145/566654.566575. Eq. 1: log-average luminance; eq. 2: scaling it to the key `a`.
- ITU-R Recommendation BT.709-6 (2015), "Parameter values for the HDTV standards for production and
  international programme exchange", derivation of the luminance signal:
  Y = 0.2126 R + 0.7152 G + 0.0722 B.

Every luminance-based operator preserves colour the same way: each channel is scaled by the ratio of
display to scene luminance, Ld / Y (with an optional saturation exponent s, C_d = Ld (C / Y)^s, as in
Schlick 1994 and the usual implementations of Durand & Dorsey 2002); channels that end above 1 are
clipped. That shared step is `scale_by_luminance`.
"""

import numba
import numpy as np

# ITU-R BT.709-6, derivation of the luminance signal (linear RGB with BT.709 primaries).
BT709_LUMINANCE_WEIGHTS = (0.2126, 0.7152, 0.0722)
# Reinhard et al. 2002, eq. 1: "a small value to avoid the singularity that occurs if black pixels
# are present in the image".
LOG_AVERAGE_DELTA = 1e-6
# Reinhard et al. 2002, section 2.1: 0.18 is the "normal key" (middle grey).
DEFAULT_KEY = 0.18


def luminance(rgb: np.ndarray) -> np.ndarray:
    """BT.709 luminance of (H, W, 3) linear RGB, as an (H, W) float64 array."""
    rgb = np.asarray(rgb, dtype=np.float64)
    if rgb.ndim != 3 or rgb.shape[2] != 3:
        raise ValueError(f"rgb must be (H, W, 3), got {rgb.shape}")
    # Y = 0.2126 R + 0.7152 G + 0.0722 B, as one pass over the pixels (einsum: no temporaries).
    return np.einsum("hwc,c->hw", rgb, np.array(BT709_LUMINANCE_WEIGHTS))


def log_average_luminance(rgb: np.ndarray, delta: float = LOG_AVERAGE_DELTA) -> float:
    """Reinhard 2002, eq. 1: exp(mean(log(delta + Y))) over all pixels of (H, W, 3) linear RGB."""
    y = luminance(rgb)
    if y.size == 0:
        raise ValueError("cannot take the log-average of an empty image")
    return float(np.exp(np.mean(np.log(delta + y))))


def exposure_scale(rgb: np.ndarray, exposure: float | None = None, key: float = DEFAULT_KEY) -> float:
    """The factor that multiplies scene radiance before an operator.

    `exposure` in EV (stops) gives 2**exposure; without it, Reinhard 2002 eq. 2 scales the image so
    that its log-average luminance maps to `key`.
    """
    if exposure is not None:
        if not np.isfinite(exposure):
            raise ValueError(f"exposure must be a finite number of stops, got {exposure}")
        return float(2.0 ** exposure)
    if not (np.isfinite(key) and key > 0.0):
        raise ValueError(f"key must be a positive number, got {key}")
    return float(key / log_average_luminance(rgb))


@numba.njit(parallel=True, cache=True, error_model="numpy")
def _luminance_ratio_rows(rgb, scene_luminance, display_luminance, saturation, out):
    for row in numba.prange(rgb.shape[0]):
        for col in range(rgb.shape[1]):
            y = scene_luminance[row, col]
            ld = display_luminance[row, col]
            for channel in range(3):
                value = 0.0  # Y = 0 (black) maps to black
                if y > 0.0:
                    if saturation == 1.0:
                        value = rgb[row, col, channel] * (ld / y)  # C_d = C Ld / Y
                    else:
                        value = ld * (rgb[row, col, channel] / y) ** saturation  # C_d = Ld (C/Y)^s
                out[row, col, channel] = min(max(value, 0.0), 1.0)


def scale_by_luminance(
    rgb: np.ndarray, scene_luminance: np.ndarray, display_luminance: np.ndarray, saturation: float = 1.0
) -> np.ndarray:
    """Give (H, W, 3) RGB the display luminance `display_luminance` (H, W), keeping its chromaticity.

    Returns (H, W, 3) float64 in [0, 1]: C * Ld / Y per channel (or Ld (C / Y)^saturation), clipped.
    """
    rgb = np.ascontiguousarray(rgb, dtype=np.float64)
    scene_luminance = np.ascontiguousarray(scene_luminance, dtype=np.float64)
    display_luminance = np.ascontiguousarray(display_luminance, dtype=np.float64)
    if rgb.ndim != 3 or rgb.shape[2] != 3:
        raise ValueError(f"rgb must be (H, W, 3), got {rgb.shape}")
    if scene_luminance.shape != rgb.shape[:2] or display_luminance.shape != rgb.shape[:2]:
        raise ValueError("luminance arrays must be (H, W) like the image")
    if not saturation > 0.0:
        raise ValueError(f"saturation must be positive, got {saturation}")
    out = np.empty_like(rgb)
    _luminance_ratio_rows(rgb, scene_luminance, display_luminance, float(saturation), out)
    return out

"""The clamp operator: exposure, then clip each channel to the display range [0, 1].

No paper: this is the identity tone curve of a linear display (common practice), kept as the
baseline against which the other operators are judged. Exposure is applied before it by
`tracer.tonemap.tonemap` (Reinhard et al. 2002, eq. 2, or a fixed number of stops).
"""

import numpy as np


def clamp(radiance: np.ndarray) -> np.ndarray:
    """Clip (H, W, 3) exposed linear radiance to [0, 1] per channel; returns float64."""
    rgb = np.asarray(radiance, dtype=np.float64)
    if rgb.ndim != 3 or rgb.shape[2] != 3:
        raise ValueError(f"radiance must be (H, W, 3), got {rgb.shape}")
    return np.clip(rgb, 0.0, 1.0)

"""False-colour heat maps of per-pixel cost, with a labelled colour bar.

Cost uses a perceptually uniform sequential map ("inferno", van der Walt & Smith 2015, the matplotlib
colour maps designed to be uniform in CAM02-UCS); ratios use a diverging map centred on 0 ("RdBu",
Brewer's ColorBrewer schemes, Harrower & Brewer 2003, The Cartographic Journal 40(1)).
matplotlib is imported on first use: it is not needed to start the program.
"""
import numpy as np

from tracer.io.atomic import atomic_path

SEQUENTIAL = "inferno"
DIVERGING = "RdBu_r"
DPI = 100
NO_VALUE = "#808080"   # pixels without a value on the scale (non-finite; zero on a log scale)


def value_range(images: list[np.ndarray], log: bool = False) -> tuple[float, float]:
    """One (low, high) for all `images` (finite values only; positive ones on a log scale)."""
    values = np.concatenate([np.asarray(im, np.float64)[np.isfinite(im)].ravel() for im in images] or [[0.0]])
    if log:
        values = values[values > 0]
        if values.size == 0:
            return 1.0, 10.0
        return float(values.min()), float(max(values.max(), values.min() * 1.0001))
    if values.size == 0:
        return 0.0, 1.0
    low, high = float(min(values.min(), 0.0)), float(values.max())
    return low, high if high > low else low + 1.0


def write_heatmaps(path: str, panels: list[tuple[str, np.ndarray]], label: str, low: float | None = None,
                   high: float | None = None, log: bool = False, diverging: bool = False) -> str:
    """Write the (H, W) images of `panels` side by side on ONE colour scale, with a colour bar.

    label: what the values are, with units (shown on the bar with the range). diverging: a map
    centred on 0 with symmetric limits (for log ratios). Written atomically; returns `path`.
    """
    from matplotlib import colormaps
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.colors import LogNorm, Normalize
    from matplotlib.figure import Figure
    images = [np.asarray(img, np.float64) for _, img in panels]
    if diverging:
        finite = np.concatenate([im[np.isfinite(im)].ravel() for im in images] or [[0.0]])
        extent = float(np.max(np.abs(finite))) if finite.size else 1.0
        extent = extent if extent > 0 else 1.0
        norm, cmap = Normalize(-extent, extent), DIVERGING
        range_text = f"range -{extent:.3g} to {extent:.3g}, 0 = equal"
    else:
        auto_low, auto_high = value_range(images, log)
        low = auto_low if low is None else low
        high = auto_high if high is None else high
        norm = LogNorm(max(low, 1e-12), high) if log else Normalize(low, high)
        cmap = SEQUENTIAL
        range_text = f"range {low:.4g} to {high:.4g}" + (", log scale" if log else "")
        if log and any(np.any(im <= 0) for im in images):
            range_text += ", grey: 0"  # a log axis has no place for 0
    h, w = images[0].shape
    n = len(images)
    scale = max(1.0, 300.0 / max(h, 1))         # tiny images are enlarged so the bar stays readable
    fig = Figure(figsize=(n * w * scale / DPI + 1.6, h * scale / DPI + 0.7), dpi=DPI)
    FigureCanvasAgg(fig)
    axes = fig.subplots(1, n, squeeze=False)[0]
    mappable = None
    for ax, (title, _), image in zip(axes, panels, images, strict=True):
        shown = np.where(np.isfinite(image), image, np.nan)
        if log:
            shown = np.where(shown > 0, shown, np.nan)
        mappable = ax.imshow(shown, cmap=colormaps[cmap].with_extremes(bad=NO_VALUE), norm=norm,
                             interpolation="nearest")
        ax.set_title(title, fontsize=9)
        ax.set_axis_off()
    bar = fig.colorbar(mappable, ax=list(axes), fraction=0.05 if n == 1 else 0.02, pad=0.02)
    bar.set_label(f"{label}\n({range_text})", fontsize=8)
    bar.ax.tick_params(labelsize=7)
    with atomic_path(path) as temporary:  # bbox "tight" keeps the bar label inside the image
        fig.savefig(temporary, dpi=DPI, format="png", bbox_inches="tight", pad_inches=0.1)
    return path

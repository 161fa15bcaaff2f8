"""Tone mapping: scene-referred linear radiance to display images.

The pipeline is one pure function of the float32 RGB values (the precision an EXR stores), so a
render's preview and `tracer tonemap` on the render's EXR give the same pixels:

    display_image = quantize(encode_sRGB(operator(2^EV * radiance or key-scaled radiance)))

- `tonemap`: exposure (fixed EV, or the log-average luminance mapped to `key`, Reinhard 2002 eq. 2)
  then an operator of `OPERATORS`; returns display-linear RGB in [0, 1].
- `display_image`: `tonemap`, then IEC 61966-2-1 encoding and 8- or 16-bit codes (optional alpha).
- `tonemap_file`: EXR in, PNG out. `contact_sheet` / `contact_sheet_file`: every operator side by
  side, labelled, to choose one by eye.

Non-finite input pixels (NaN, +-Inf in any channel) are shown black and reported once through a
`NonFiniteWarning` (count and the first few (row, col)); negative radiance is treated as zero.
"""

import inspect
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from tracer.errors import input_error
from tracer.io import read_exr, write_png

from .clamp import clamp
from .drago2003 import drago
from .durand2002 import durand
from .exposure import DEFAULT_KEY, exposure_scale, log_average_luminance, luminance
from .larson1997 import histogram
from .reinhard2002 import reinhard
from .srgb import quantize, quantize_alpha

OPERATORS = {
    "clamp": clamp,
    "reinhard": reinhard,
    "drago": drago,
    "durand": durand,
    "histogram": histogram,
}
DEFAULT_OPERATOR = "reinhard"
NONFINITE_EXAMPLES = 5  # how many pixel positions a non-finite report lists
SHEET_TILE_WIDTH = 800  # contact-sheet tiles wider than this are box-filtered down
SHEET_LABEL_HEIGHT = 32  # pixels
SHEET_GAP = 8  # pixels between tiles
SHEET_BACKGROUND = 30  # 8-bit grey behind labels and gaps

__all__ = [
    "OPERATORS", "DEFAULT_OPERATOR", "NonFiniteWarning", "NonFiniteReport", "find_nonfinite",
    "operator_parameters", "tonemap", "display_image", "tonemap_file", "contact_sheet",
    "contact_sheet_file", "default_sheet_path", "exposure_scale", "log_average_luminance", "luminance",
]


class NonFiniteWarning(UserWarning):
    """The radiance holds NaN or infinite values; those pixels are shown black."""


@dataclass(frozen=True)
class NonFiniteReport:
    """Pixels with a non-finite channel: how many, and the first few in row-major order."""

    count: int
    first: tuple[tuple[int, int], ...]

    def __str__(self) -> str:
        where = ", ".join(f"({row}, {col})" for row, col in self.first)
        more = ", ..." if self.count > len(self.first) else ""
        noun = "pixel" if self.count == 1 else "pixels"
        return f"{self.count} {noun} with NaN or Inf shown black, at (row, col) {where}{more}"


def find_nonfinite(radiance: np.ndarray, limit: int = NONFINITE_EXAMPLES) -> NonFiniteReport:
    """Count the (H, W) pixels of (H, W, C) `radiance` with any non-finite channel."""
    bad = ~np.isfinite(np.asarray(radiance)).all(axis=-1)
    rows, cols = np.nonzero(bad)
    first = tuple((int(row), int(col)) for row, col in zip(rows[:limit], cols[:limit], strict=True))
    return NonFiniteReport(int(rows.size), first)


def operator_parameters(operator: str) -> tuple[str, ...]:
    """The keyword parameters operator `operator` accepts (besides the radiance)."""
    function = _lookup(operator)
    return tuple(list(inspect.signature(function).parameters)[1:])


def _lookup(operator: str):
    try:
        return OPERATORS[operator]
    except KeyError:
        raise ValueError(f"unknown operator {operator!r}; choose one of {', '.join(OPERATORS)}") from None


def _checked_rgb(radiance: np.ndarray) -> np.ndarray:
    rgb = np.asarray(radiance)
    if rgb.ndim != 3 or rgb.shape[2] != 3:
        raise ValueError(f"radiance must be (H, W, 3), got {rgb.shape}")
    if rgb.shape[0] == 0 or rgb.shape[1] == 0:
        raise ValueError("radiance is an empty image")
    return rgb


def _sanitize(rgb: np.ndarray) -> np.ndarray:
    """In place on float64 `rgb`: non-finite pixels black (reported by a warning), negatives zero."""
    # One sum finds whether anything is NaN or Inf (they propagate); the pixel scan only if so.
    if not np.isfinite(np.sum(rgb)):
        report = find_nonfinite(rgb)
        if report.count:
            warnings.warn(NonFiniteWarning(str(report)), stacklevel=3)
            rgb[~np.isfinite(rgb).all(axis=-1)] = 0.0
    np.maximum(rgb, 0.0, out=rgb)  # negative light cannot be shown; operators assume Y >= 0
    return rgb


def _apply(rgb: np.ndarray, operator: str, exposure, key, white, params: dict) -> np.ndarray:
    function = _lookup(operator)
    accepted = operator_parameters(operator)
    if white is not None:
        params = {**params, "white": white}
    unknown = sorted(set(params) - set(accepted))
    if unknown:
        takes = ", ".join(accepted) or "no parameters"
        raise ValueError(f"operator {operator!r} does not take {', '.join(unknown)} (takes: {takes})")
    scale = exposure_scale(rgb, exposure, key)
    return function(rgb * scale, **params)


def tonemap(
    radiance: np.ndarray, operator: str = DEFAULT_OPERATOR, exposure: float | None = None,
    key: float = DEFAULT_KEY, white: float | None = None, **params,
) -> np.ndarray:
    """Map (H, W, 3) scene-linear radiance to (H, W, 3) display-linear float64 in [0, 1].

    `exposure` in EV multiplies the radiance by 2**exposure; when None the log-average luminance is
    scaled to `key` (Reinhard 2002, eqs. 1-2). `white` is the smallest luminance after exposure that
    maps to white (reinhard, drago; default the image maximum). Other keyword parameters go to the
    operator (see `operator_parameters`): saturation, bias (drago), contrast, sigma_spatial,
    sigma_range (durand), bins, display_range (histogram). Encoding is not applied (see
    `display_image`).
    """
    rgb = np.array(_checked_rgb(radiance), dtype=np.float64)
    return _apply(_sanitize(rgb), operator, exposure, key, white, params)


def display_image(
    radiance: np.ndarray, operator: str = DEFAULT_OPERATOR, exposure: float | None = None,
    key: float = DEFAULT_KEY, white: float | None = None, bits: int = 8, dither: bool = False,
    seed: int = 0, alpha: np.ndarray | None = None, **params,
) -> np.ndarray:
    """The display image of (H, W, 3) radiance: (H, W, 3), or (H, W, 4) with `alpha`, uint8/uint16.

    The radiance is first rounded to float32, what an EXR holds, so calling this on a render's
    float64 radiance and on the EXR written from it gives the same codes. `alpha` (H, W) is
    associated (premultiplied) coverage as in OpenEXR; PNG stores straight alpha, so colour is
    divided by alpha where alpha > 0 before tone mapping. sRGB encoding per IEC 61966-2-1; `dither`
    adds seeded triangular noise of +-0.5 LSB before rounding.
    """
    with np.errstate(over="ignore"):  # beyond float32 range is +-Inf, as in an EXR; reported below
        rgb = np.asarray(_checked_rgb(radiance), dtype=np.float32).astype(np.float64)
    coverage = None
    if alpha is not None:
        coverage = np.asarray(alpha, dtype=np.float32).astype(np.float64)
        if coverage.shape != rgb.shape[:2]:
            raise ValueError(f"alpha must be {rgb.shape[:2]}, got {coverage.shape}")
    _sanitize(rgb)
    if coverage is not None:
        covered = coverage > 0.0
        rgb[covered] /= coverage[covered][:, None]
    display = _apply(rgb, operator, exposure, key, white, params)
    codes = quantize(display, bits, dither, seed)
    if coverage is None:
        return codes
    return np.concatenate([codes, quantize_alpha(coverage, bits)[..., None]], axis=2)


def _checked_output(in_path, out_path) -> Path:
    out = Path(out_path)
    if out.resolve() == Path(in_path).resolve():
        raise input_error(out, None, None, "the output would overwrite the input EXR")
    return out


def _read_radiance(in_path) -> tuple[np.ndarray, np.ndarray | None]:
    channels, _ = read_exr(in_path)
    rgb = np.stack([channels["R"], channels["G"], channels["B"]], axis=-1).astype(np.float32)
    alpha = channels.get("A")
    if alpha is not None and alpha.shape != rgb.shape[:2]:
        alpha = None  # a subsampled alpha cannot be paired with the pixels; show the colour alone
    return rgb, alpha


def tonemap_file(
    in_path, out_path=None, operator: str = DEFAULT_OPERATOR, exposure: float | None = None,
    key: float = DEFAULT_KEY, white: float | None = None, bits: int = 8, dither: bool = False,
    seed: int = 0, **params,
) -> Path:
    """Read the R, G, B (and A, if present) channels of EXR `in_path`, write a PNG; returns its path.

    The default output is `in_path` with the suffix `.png`. Raises `UserError` for an unreadable
    input; non-finite pixels raise a `NonFiniteWarning`.
    """
    rgb, alpha = _read_radiance(in_path)
    out = _checked_output(in_path, out_path if out_path is not None else Path(in_path).with_suffix(".png"))
    image = display_image(rgb, operator, exposure, key, white, bits, dither, seed, alpha=alpha, **params)
    return write_png(out, image)


def _box_downsample(image: np.ndarray, factor: int) -> np.ndarray:
    """Average `factor` x `factor` blocks of display-linear light (the edge remainder is dropped)."""
    if factor <= 1:
        return image
    height = image.shape[0] // factor * factor
    width = image.shape[1] // factor * factor
    blocks = image[:height, :width].reshape(height // factor, factor, width // factor, factor, -1)
    return blocks.mean(axis=(1, 3))


def _label_strip(text: str, width: int, height: int) -> np.ndarray:
    """An (height, width, 3) uint8 strip with `text` centred, white on dark grey."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    dpi = 100
    grey = SHEET_BACKGROUND / 255.0
    figure = Figure(figsize=(width / dpi, height / dpi), dpi=dpi, facecolor=(grey, grey, grey))
    canvas = FigureCanvasAgg(figure)
    figure.text(0.5, 0.5, text, color="white", ha="center", va="center", fontsize=0.45 * height * 72 / dpi)
    canvas.draw()
    pixels = np.asarray(canvas.buffer_rgba())[:height, :width, :3]
    strip = np.full((height, width, 3), SHEET_BACKGROUND, dtype=np.uint8)
    strip[: pixels.shape[0], : pixels.shape[1]] = pixels
    return strip


def contact_sheet(
    radiance: np.ndarray, exposure: float | None = None, key: float = DEFAULT_KEY,
    operators: tuple[str, ...] | None = None, tile_width: int = SHEET_TILE_WIDTH, **params,
) -> np.ndarray:
    """Every operator (or those named) side by side, each under a label: (H', W', 3) uint8.

    Each operator gets the parameters of `params` it accepts (e.g. `bias` only drago). Tiles are
    tone-mapped at full resolution, then box-filtered in display-linear light down to at most
    `tile_width` pixels wide, then sRGB-encoded.
    """
    with np.errstate(over="ignore"):  # as display_image: the float32 values an EXR would hold
        rgb = _sanitize(np.asarray(_checked_rgb(radiance), dtype=np.float32).astype(np.float64))
    names = tuple(operators) if operators is not None else tuple(OPERATORS)
    factor = max(1, -(-rgb.shape[1] // max(int(tile_width), 1)))
    columns = []
    for name in names:
        accepted = operator_parameters(name)
        own = {option: value for option, value in params.items() if option in accepted and value is not None}
        display = _box_downsample(_apply(rgb, name, exposure, key, None, own), factor)
        tile = quantize(display, 8)
        settings = ", ".join(f"{option} {value:g}" for option, value in own.items())
        label = _label_strip(f"{name} ({settings})" if settings else name, tile.shape[1], SHEET_LABEL_HEIGHT)
        columns.append(np.concatenate([label, tile], axis=0))
    gap = np.full((columns[0].shape[0], SHEET_GAP, 3), SHEET_BACKGROUND, dtype=np.uint8)
    pieces = []
    for index, column in enumerate(columns):
        if index:
            pieces.append(gap)
        pieces.append(column)
    return np.concatenate(pieces, axis=1)


def default_sheet_path(in_path) -> Path:
    """Where `contact_sheet_file` writes by default: IN-operators.png beside IN."""
    in_path = Path(in_path)
    return in_path.with_name(f"{in_path.stem}-operators.png")


def contact_sheet_file(
    in_path, out_path=None, exposure: float | None = None, key: float = DEFAULT_KEY,
    operators: tuple[str, ...] | None = None, tile_width: int = SHEET_TILE_WIDTH, **params,
) -> Path:
    """Read EXR `in_path`, write its contact sheet (default IN-operators.png); returns the path."""
    rgb, _ = _read_radiance(in_path)
    sheet = contact_sheet(rgb, exposure, key, operators, tile_width, **params)
    out = _checked_output(in_path, out_path if out_path is not None else default_sheet_path(in_path))
    return write_png(out, sheet)

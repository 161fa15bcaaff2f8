"""Tone-mapping stage: operators, exposure, sRGB encoding, the file pipeline and its command.

Each check names its source: the standard (IEC 61966-2-1, ITU-R BT.709-6), the paper and equation,
the reference library (colour-science), or "common practice".
"""

import argparse
import math
import warnings

import colour
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from tracer.errors import UserError
from tracer.io import read_exr, write_exr
from tracer.tonemap import (
    OPERATORS,
    NonFiniteWarning,
    contact_sheet,
    default_sheet_path,
    display_image,
    find_nonfinite,
    tonemap,
    tonemap_file,
)
from tracer.tonemap import command as tonemap_command
from tracer.tonemap.drago2003 import drago, drago_luminance
from tracer.tonemap.durand2002 import bilateral_log_base, durand, durand_luminance
from tracer.tonemap.exposure import (
    BT709_LUMINANCE_WEIGHTS,
    LOG_AVERAGE_DELTA,
    exposure_scale,
    log_average_luminance,
    luminance,
)
from tracer.tonemap.larson1997 import histogram, histogram_brightness_map, linear_ceiling
from tracer.tonemap.reinhard2002 import reinhard
from tracer.tonemap.srgb import decode, encode, quantize, triangular_dither

FORMULA_TOLERANCE = 1e-9  # closed forms evaluated in float64
HAND_TOLERANCE = 1e-6  # values worked by hand to 7+ significant digits
LSB_TOLERANCE = 1  # quantised codes against a reference implementation


def grey(height: int, width: int, value: float) -> np.ndarray:
    return np.full((height, width, 3), value, dtype=np.float64)


# --- sRGB (IEC 61966-2-1) -------------------------------------------------------------------------


def test_srgb_encoding_matches_iec_61966_2_1_values():
    # IEC 61966-2-1: V' = 12.92 V for V <= 0.0031308, else 1.055 V^(1/2.4) - 0.055. Worked by hand:
    linear = np.array([0.0, 0.001, 0.0031308, 0.5, 1.0])
    expected = np.array([
        0.0,  # toe: 12.92 * 0
        0.01292,  # toe: 12.92 * 0.001
        0.040449936,  # toe at the threshold: 12.92 * 0.0031308
        0.735356983,  # 0.5^(1/2.4) = 0.749153538; 1.055 * 0.749153538 - 0.055
        1.0,  # 1.055 * 1 - 0.055
    ])
    assert np.allclose(encode(linear), expected, rtol=0, atol=HAND_TOLERANCE)


def test_srgb_toe_is_linear_not_a_power_curve():
    # IEC 61966-2-1: slope 12.92 below 0.0031308 (a 2.2 power would be infinitely steep at 0).
    toe = np.linspace(0.0, 0.0031308, 50)
    assert np.allclose(encode(toe), 12.92 * toe, rtol=0, atol=FORMULA_TOLERANCE)
    # The two branches of the standard meet at the threshold to within 3e-8 (property of the constants).
    power_branch = 1.055 * 0.0031308 ** (1 / 2.4) - 0.055
    assert abs(power_branch - 12.92 * 0.0031308) < 3e-8


def test_srgb_decode_inverts_encode():
    # IEC 61966-2-1 decoding: V = V'/12.92 below 0.04045, else ((V' + 0.055) / 1.055)^2.4.
    linear = np.concatenate([np.linspace(0, 0.01, 101), np.geomspace(1e-6, 1.0, 200)])
    assert np.allclose(decode(encode(linear)), linear, rtol=1e-12, atol=1e-15)
    assert decode(np.array([0.04045]))[0] == pytest.approx(0.04045 / 12.92, abs=FORMULA_TOLERANCE)


def test_srgb_encoding_matches_colour_science():
    # Reference library: colour-science's cctf_encoding(x, "sRGB").
    linear = np.concatenate([np.linspace(0.0, 0.01, 2001), np.geomspace(1e-7, 1.0, 5000)])
    assert np.allclose(encode(linear), colour.cctf_encoding(linear, function="sRGB"), rtol=0, atol=1e-12)


@pytest.mark.parametrize("bits", [8, 16])
def test_srgb_codes_match_colour_science_within_one_lsb(bits):
    # Reference library: colour-science's sRGB encoding, rounded to the nearest code; includes the toe.
    linear = np.concatenate([np.linspace(0.0, 0.0031308, 3001), np.linspace(0.0031308, 1.0, 60001)])
    max_code = 2**bits - 1
    reference = np.round(colour.cctf_encoding(linear, function="sRGB") * max_code).astype(np.int64)
    codes = quantize(linear.reshape(1, -1, 1), bits=bits).reshape(-1).astype(np.int64)
    assert codes.dtype == np.int64 and codes.max() == max_code
    assert np.abs(codes - reference).max() <= LSB_TOLERANCE
    assert quantize(np.zeros((1, 1, 3)), bits).dtype == (np.uint8 if bits == 8 else np.uint16)


def test_quantize_known_codes():
    # IEC 61966-2-1 worked by hand: 0.18 -> 1.055 * 0.18^(1/2.4) - 0.055 = 0.461356 -> 8-bit 117.64 -> 118,
    # 16-bit 30234.97 -> 30235; 1.0 -> 255 / 65535; out-of-range values are clipped.
    values = np.array([[[0.18, 1.0, 2.0], [-1.0, 0.0, np.nan]]])
    assert quantize(values, 8).tolist() == [[[118, 255, 255], [0, 0, 0]]]
    assert quantize(values, 16)[0, 0, 0] == 30235


def test_dither_is_triangular_half_lsb_and_repeatable():
    # Contract (INTERFACE.md): +-0.5 LSB triangular dither, repeatable. Triangular on (-0.5, 0.5):
    # mean 0, variance 0.5^2 / 6 = 0.041667 (difference of two uniforms of width 0.5; common practice).
    noise = triangular_dither((200, 300, 3), seed=7).astype(np.float64)
    assert np.abs(noise).max() < 0.5
    assert abs(noise.mean()) < 0.002
    assert noise.var() == pytest.approx(0.25 / 6, rel=0.02)
    ramp = np.linspace(0.0, 1.0, 3 * 200 * 300).reshape(200, 300, 3)
    plain = quantize(ramp, 8).astype(np.int64)
    first = quantize(ramp, 8, dither=True, seed=3)
    assert np.array_equal(first, quantize(ramp, 8, dither=True, seed=3))
    assert not np.array_equal(first, quantize(ramp, 8, dither=True, seed=4))
    assert np.abs(first.astype(np.int64) - plain).max() <= 1


# --- luminance and exposure (ITU-R BT.709, Reinhard 2002) -----------------------------------------


def test_bt709_luminance_weights():
    # ITU-R BT.709-6, derivation of the luminance signal: Y = 0.2126 R + 0.7152 G + 0.0722 B.
    assert BT709_LUMINANCE_WEIGHTS == (0.2126, 0.7152, 0.0722)
    primaries = np.eye(3).reshape(1, 3, 3)
    assert np.allclose(luminance(primaries), [[0.2126, 0.7152, 0.0722]], rtol=0, atol=FORMULA_TOLERANCE)
    assert luminance(grey(1, 1, 1.0))[0, 0] == pytest.approx(1.0, abs=FORMULA_TOLERANCE)
    # Reference library: colour-science derives the Y row of BT.709's RGB->XYZ matrix from the
    # primaries and D65; the standard's rounded weights agree to 4 decimals.
    y_row = colour.RGB_COLOURSPACES["ITU-R BT.709"].matrix_RGB_to_XYZ[1]
    assert np.allclose(y_row, BT709_LUMINANCE_WEIGHTS, rtol=0, atol=5e-4)


def test_log_average_is_reinhard_equation_1():
    # Reinhard et al. 2002, eq. 1: exp(mean(log(delta + Y))), delta = 1e-6. For two pixels of
    # luminance 1 and 4 this is the geometric mean sqrt((1 + 1e-6)(4 + 1e-6)) = sqrt(4 + 5e-6 + 1e-12)
    # = 2 + 5e-6 / 4 = 2.00000125 (first order; the next term is below 1e-12).
    image = np.array([[[1.0, 1.0, 1.0], [4.0, 4.0, 4.0]]])
    assert LOG_AVERAGE_DELTA == 1e-6
    assert log_average_luminance(image) == pytest.approx(2.00000125, abs=1e-11)
    # An all-black image: exp(log(1e-6)) = 1e-6.
    assert log_average_luminance(grey(2, 2, 0.0)) == pytest.approx(1e-6, rel=FORMULA_TOLERANCE)


@pytest.mark.parametrize("g", [1e-3, 0.5, 3.0, 250.0])
def test_uniform_image_maps_to_the_key(g):
    # Reinhard et al. 2002, eq. 2: L = a / Lw_avg * Lw. A uniform image of value g has Lw_avg = g + delta,
    # so it maps to 0.18 g / (g + 1e-6), i.e. 0.18 to within 1e-6 / g relative, before the operator
    # (clamp is the identity inside [0, 1]).
    image = grey(4, 5, g)
    expected = 0.18 * g / (g + 1e-6)
    assert exposure_scale(image) * g == pytest.approx(expected, rel=FORMULA_TOLERANCE)
    assert expected == pytest.approx(0.18, rel=1.1e-3)
    assert np.allclose(tonemap(image, "clamp"), expected, rtol=FORMULA_TOLERANCE, atol=0)
    # Another key: 0.09 (Reinhard 2002, table of keys: "low key" scenes use smaller a).
    assert np.allclose(tonemap(image, "clamp", key=0.09), 0.09 * g / (g + 1e-6), rtol=FORMULA_TOLERANCE)


def test_exposure_in_stops_multiplies_by_two_to_the_ev():
    # Contract (INTERFACE.md): --exposure EV multiplies radiance by 2^EV before the operator.
    image = np.random.default_rng(1).uniform(0.0, 0.2, (6, 7, 3))
    assert np.allclose(tonemap(image, "clamp", exposure=1.5), np.clip(image * 2**1.5, 0, 1), atol=0)
    assert np.allclose(tonemap(image, "clamp", exposure=-2.0), image / 4.0, rtol=FORMULA_TOLERANCE, atol=0)


# --- Reinhard 2002, eq. 4 -------------------------------------------------------------------------


def test_reinhard_worked_values():
    # Reinhard et al. 2002, eq. 4: Ld = L (1 + L / Lwhite^2) / (1 + L); colour scaled by Ld / Y.
    # Grey pixel L = 1, Lwhite = 2: Ld = 1 * (1 + 1/4) / (1 + 1) = 1.25 / 2 = 0.625.
    assert np.allclose(reinhard(grey(1, 1, 1.0), white=2.0), 0.625, rtol=0, atol=HAND_TOLERANCE)
    # Colour pixel (0.5, 1, 2), Lwhite = 4:
    #   Y = 0.2126 * 0.5 + 0.7152 * 1 + 0.0722 * 2 = 0.1063 + 0.7152 + 0.1444 = 0.9659
    #   Ld = 0.9659 * (1 + 0.9659 / 16) / (1 + 0.9659) = 0.9659 * 1.06036875 / 1.9659 = 0.52098793
    #   R = 0.5 * Ld / Y = 0.26969041, G = 1 * Ld / Y = 0.53938082, B = 2 * Ld / Y = 1.0787616 -> 1 (clipped)
    pixel = np.array([[[0.5, 1.0, 2.0]]])
    out = reinhard(pixel, white=4.0)
    assert np.allclose(out[0, 0], [0.26969041, 0.53938082, 1.0], rtol=0, atol=HAND_TOLERANCE)
    # With Lwhite -> infinity eq. 4 becomes eq. 3, Ld = L / (1 + L): L = 3 -> 0.75.
    assert np.allclose(reinhard(grey(1, 1, 3.0), white=1e12), 0.75, rtol=0, atol=HAND_TOLERANCE)


def test_reinhard_white_point_and_black():
    # Reinhard et al. 2002, eq. 4: L = Lwhite gives Ld = Lwhite (1 + 1/Lwhite) / (1 + Lwhite) = 1.
    # Contract: the default white is the maximum luminance after exposure; Y = 0 maps to 0.
    image = np.array([[[0.0, 0.0, 0.0], [0.3, 0.3, 0.3], [7.0, 7.0, 7.0]]])
    out = reinhard(image)
    assert np.allclose(out[0, 2], 1.0, atol=FORMULA_TOLERANCE)
    assert np.array_equal(out[0, 0], [0.0, 0.0, 0.0])
    assert np.allclose(out[0, 1], 0.3 * (1 + 0.3 / 49) / 1.3, atol=FORMULA_TOLERANCE)


def test_reinhard_white_is_after_exposure():
    # Contract (INTERFACE.md): --white L is "the smallest luminance mapped to white, after exposure".
    image = np.random.default_rng(2).uniform(0.0, 3.0, (5, 6, 3))
    through_pipeline = tonemap(image, "reinhard", exposure=1.0, white=2.5)
    assert np.allclose(through_pipeline, reinhard(image * 2.0, white=2.5), atol=FORMULA_TOLERANCE)


@settings(max_examples=40, deadline=None)
@given(st.lists(st.floats(0.0, 1e4), min_size=3, max_size=3), st.floats(0.01, 1e3))
def test_reinhard_keeps_chromaticity_unless_clipped(rgb, white):
    # Common practice (and the contract): R, G, B scaled by the same Ld / Y, so their ratios survive.
    pixel = np.array([[rgb]], dtype=np.float64)
    out = reinhard(pixel, white=white)[0, 0]
    assert np.all(out >= 0.0) and np.all(out <= 1.0)
    if np.all(out < 1.0) and max(rgb) > 0 and luminance(pixel)[0, 0] > 0:
        assert np.allclose(out / out.max(), np.array(rgb) / max(rgb), atol=1e-9)


# --- Drago 2003, eq. 4 ----------------------------------------------------------------------------


def test_drago_worked_values():
    # Drago et al. 2003, eq. 4 with Ldmax = 100 cd/m^2 (so Ldmax * 0.01 = 1):
    # Ld = 1 / log10(Lwmax + 1) * ln(Lw + 1) / ln(2 + 8 (Lw / Lwmax)^(ln b / ln 0.5)).
    # Lw = 1, Lwmax = 10, b = 0.85:
    #   exponent = ln 0.85 / ln 0.5 = -0.1625189 / -0.6931472 = 0.23446525
    #   0.1^0.23446525 = 0.58282040;  2 + 8 * 0.58282040 = 6.6625632;  ln(6.6625632) = 1.8965043
    #   log10(11) = 1.0413927;  ln 2 = 0.6931472
    #   Ld = 0.6931472 / 1.8965043 / 1.0413927 = 0.35095959
    assert drago_luminance(np.array(1.0), 10.0, 0.85) == pytest.approx(0.35095959, abs=HAND_TOLERANCE)
    # b = 0.5 makes the exponent 1: Ld = ln 2 / ln(2 + 8 * 0.1) / log10 11
    #   = 0.6931472 / 1.0296194 / 1.0413927 = 0.64644892
    assert drago_luminance(np.array(1.0), 10.0, 0.5) == pytest.approx(0.64644892, abs=HAND_TOLERANCE)
    # Lw = Lwmax: ln(Lwmax + 1) / ln 10 / log10(Lwmax + 1) = 1 exactly; Lw = 0 gives 0.
    ends = drago_luminance(np.array([0.0, 10.0]), 10.0, 0.85)
    assert ends == pytest.approx([0.0, 1.0], abs=FORMULA_TOLERANCE)


def test_drago_operator_on_an_image():
    # Drago et al. 2003, eq. 4 applied to luminance, colour by Ld / Y (common practice); Lwmax = the
    # image maximum, so the brightest pixel is white.
    image = np.array([[[1.0, 1.0, 1.0], [10.0, 10.0, 10.0], [0.0, 0.0, 0.0]]])
    out = drago(image, bias=0.85)
    assert np.allclose(out[0, :, 0], [0.35095959, 1.0, 0.0], atol=HAND_TOLERANCE)
    assert np.allclose(out[..., 0], out[..., 2], atol=FORMULA_TOLERANCE)
    # Monotonic in Lw (Drago et al. 2003: the mapping is a monotonic logarithm).
    ramp = np.geomspace(1e-4, 1e3, 500)
    assert np.all(np.diff(drago_luminance(ramp, 1e3, 0.85)) > 0)


# --- Ward Larson, Rushmeier & Piatko 1997 ---------------------------------------------------------


def paper_trimming_ceiling(counts, bin_width, display_log_range, tolerance=1e-12, limit=100000):
    """Ward Larson et al. 1997, section 4 (from memory): trim bins above T * db / (log Ldmax - log Ldmin),
    recompute T, repeat until the trimmings fall below tolerance * T; 0 if everything is trimmed away."""
    counts = np.asarray(counts, dtype=np.float64).copy()
    for _ in range(limit):
        total = counts.sum()
        if total <= 0:
            return 0.0
        ceiling = total * bin_width / display_log_range
        trimmed = np.maximum(counts - ceiling, 0.0).sum()
        counts = np.minimum(counts, ceiling)
        if trimmed <= tolerance * total:
            return ceiling
    return 0.0


def test_linear_ceiling_is_where_the_papers_iteration_converges():
    rng = np.random.default_rng(5)
    for _ in range(20):
        counts = rng.integers(0, 5000, 100) * (rng.random(100) < 0.7)
        counts[rng.integers(0, 100, 3)] += 200000  # a few crowded bins, so trimming matters
        width = 0.08  # 8 decades in 100 bins, onto a 2-decade display
        exact = linear_ceiling(counts, width, 2.0)
        iterated = paper_trimming_ceiling(counts, width, 2.0)
        assert exact == pytest.approx(iterated, rel=1e-6)
        assert exact == pytest.approx(width / 2.0 * np.minimum(counts, exact).sum(), rel=1e-12)


def test_histogram_operator_monotonic_and_never_steeper_than_linear():
    # Ward Larson et al. 1997, the linear ceiling: dLd/dLw <= Ld/Lw, i.e. slope <= 1 in log-log space
    # (a linear mapping has slope exactly 1 there). Scene: 8 decades, with crowded luminances.
    rng = np.random.default_rng(11)
    world = np.concatenate([rng.normal(-2.0, 0.05, 40000), rng.normal(1.0, 0.3, 20000),
                            rng.uniform(-4.0, 4.0, 3000)])
    display = histogram_brightness_map(world, bins=100, display_range=100.0)
    order = np.argsort(world)
    world_sorted, display_sorted = world[order], display[order]
    steps = np.diff(world_sorted)
    rises = np.diff(display_sorted)
    assert np.all(rises >= -1e-12)  # monotonic
    assert np.all(rises <= steps + 1e-12)  # never steeper than linear
    assert display_sorted[-1] == pytest.approx(0.0, abs=1e-12)  # brightest at Ldmax
    assert display_sorted[0] == pytest.approx(-2.0, abs=1e-12)  # darkest at Ldmin = Ldmax / 100
    # The ceiling binds in the crowded range: somewhere the slope is (nearly) the linear one.
    wide = steps > 1e-6
    assert (rises[wide] / steps[wide]).max() > 0.95


def test_histogram_operator_linear_when_the_scene_fits_the_display():
    # Ward Larson et al. 1997: when the world range fits the display range a linear mapping is used.
    world = np.log10(np.array([0.5, 1.0, 2.0, 20.0]))  # 1.6 decades < 2 decades of the display
    assert np.allclose(histogram_brightness_map(world), world - world.max(), atol=FORMULA_TOLERANCE)


def test_histogram_operator_on_an_image():
    rng = np.random.default_rng(3)
    y = 10.0 ** rng.uniform(-3.0, 3.0, (64, 64))
    image = np.repeat(y[..., None], 3, axis=2)
    image[0, 0] = 0.0
    out = histogram(image)
    assert out[0, 0].tolist() == [0.0, 0.0, 0.0]  # black stays black
    lit = out[..., 0][luminance(image) > 0]
    assert lit.max() == pytest.approx(1.0) and lit.min() >= 0.01 - 1e-12  # [Ldmin, Ldmax] / Ldmax
    flat_y, flat_out = y.ravel()[1:], out[..., 1].ravel()[1:]
    order = np.argsort(flat_y)
    assert np.all(np.diff(flat_out[order]) >= -1e-12)


# --- Durand & Dorsey 2002 -------------------------------------------------------------------------


def brute_force_bilateral(signal, sigma_spatial, sigma_range):
    """The bilateral filter by its definition (Durand & Dorsey 2002, eq. for J_s), every pixel pair."""
    height, width = signal.shape
    rows, cols = np.mgrid[0:height, 0:width]
    points = np.stack([rows.ravel(), cols.ravel()], 1).astype(np.float64)
    values = signal.ravel()
    distance2 = ((points[:, None, :] - points[None, :, :]) ** 2).sum(-1)
    weights = np.exp(-distance2 / (2 * sigma_spatial**2)) * np.exp(
        -((values[:, None] - values[None, :]) ** 2) / (2 * sigma_range**2))
    return (weights @ values / weights.sum(1)).reshape(height, width)


def test_bilateral_grid_approximates_the_bilateral_filter():
    # Paris & Durand 2009: the grid approximates the brute-force bilateral filter; here to 0.02 log10
    # units on a step edge of 2 decades with noise (sigma_r = 0.4, the paper's range sigma).
    rng = np.random.default_rng(9)
    signal = np.where(np.arange(40)[None, :] < 17, -1.0, 1.0) + rng.normal(0.0, 0.1, (30, 40))
    signal += 0.3 * np.sin(np.arange(30)[:, None] / 4.0)
    fast = bilateral_log_base(signal, np.ones_like(signal), 3.0, 0.4)
    slow = brute_force_bilateral(signal, 3.0, 0.4)
    assert np.abs(fast - slow).max() < 0.02


def test_durand_compresses_the_base_to_the_target_contrast_and_keeps_detail():
    # Durand & Dorsey 2002: only the base layer is compressed, to the target contrast (5:1 by default),
    # the brightest base maps to white, detail passes unchanged. Scene: a step edge of 3 decades
    # (0.01 | 10) times a fine checker texture of +-0.05 log10 units.
    height, width = 96, 192
    rows, cols = np.mgrid[0:height, 0:width]
    texture = np.where((rows + cols) % 2 == 0, 0.05, -0.05)
    log_y = np.where(cols < width // 2, -2.0, 1.0) + texture
    out_log = np.log10(durand_luminance(10.0**log_y, contrast=5.0))  # before clipping to the display
    margin = int(3 * 0.02 * width) + 2  # 3 spatial sigmas from the edge and the border
    dark = out_log[margin:-margin, margin:width // 2 - margin]
    bright = out_log[margin:-margin, width // 2 + margin:-margin]
    assert bright.mean() - dark.mean() == pytest.approx(math.log10(5.0), abs=0.01)
    assert bright.mean() == pytest.approx(0.0, abs=0.01)  # the brightest base is white (log 0)
    input_detail = texture[margin:-margin, margin:width // 2 - margin].std()
    assert dark.std() == pytest.approx(input_detail, rel=0.05)
    assert bright.std() == pytest.approx(input_detail, rel=0.05)
    # The operator on the image: the same luminances, clipped at white (detail above the brightest
    # base cannot be shown).
    image = np.repeat((10.0**log_y)[..., None], 3, axis=2)
    shown = durand(image, contrast=5.0)[..., 0]
    assert np.allclose(shown, np.minimum(10.0**out_log, 1.0), rtol=1e-12, atol=0)


def test_durand_leaves_a_low_contrast_base_alone():
    # Our departure from the paper (documented): a base already within the target contrast is not
    # expanded, so a 2:1 image stays 2:1.
    image = np.ones((32, 64, 3))
    image[:, 32:] = 2.0
    out = durand(image)
    assert out[:, 40:].mean() / out[:, :24].mean() == pytest.approx(2.0, rel=0.01)


# --- the pipeline ---------------------------------------------------------------------------------


@pytest.mark.parametrize("operator", list(OPERATORS))
def test_every_operator_maps_into_the_display_range(operator):
    rng = np.random.default_rng(4)
    image = 10.0 ** rng.uniform(-4, 4, (40, 50, 1)) * rng.uniform(0.2, 1.0, (40, 50, 3))
    out = tonemap(image, operator)
    assert out.shape == image.shape and out.dtype == np.float64
    assert np.all(out >= 0.0) and np.all(out <= 1.0)


@pytest.mark.parametrize("operator", list(OPERATORS))
def test_nonfinite_pixels_are_black_and_counted(operator):
    # Contract: NaN/Inf reported (count, where) and mapped to black, never crashing.
    rng = np.random.default_rng(6)
    image = rng.uniform(0.0, 5.0, (20, 30, 3))
    clean = image.copy()
    image[2, 3, 0] = np.nan
    image[7, 1, 2] = np.inf
    image[9, 29] = -np.inf
    clean[2, 3] = clean[7, 1] = clean[9, 29] = 0.0
    with pytest.warns(NonFiniteWarning, match=r"3 pixels .*\(2, 3\), \(7, 1\), \(9, 29\)"):
        out = tonemap(image, operator)
    assert out[2, 3].tolist() == out[7, 1].tolist() == out[9, 29].tolist() == [0.0, 0.0, 0.0]
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert np.array_equal(out, tonemap(clean, operator))
    report = find_nonfinite(image, limit=2)
    assert report.count == 3 and report.first == ((2, 3), (7, 1))


def test_all_nonfinite_image_is_black():
    image = np.full((4, 4, 3), np.nan)
    with pytest.warns(NonFiniteWarning):
        assert not display_image(image).any()


def test_display_image_is_a_function_of_the_float32_values():
    # Contract: a render's preview equals `tracer tonemap` of its EXR (float32 channels).
    rng = np.random.default_rng(8)
    radiance = 10.0 ** rng.uniform(-3, 2, (30, 40, 3))
    as_stored = radiance.astype(np.float32)
    for operator in OPERATORS:
        assert np.array_equal(display_image(radiance, operator), display_image(as_stored, operator))


def test_unknown_operator_and_parameters_are_refused():
    image = grey(2, 2, 1.0)
    with pytest.raises(ValueError, match="unknown operator"):
        tonemap(image, "sepia")
    with pytest.raises(ValueError, match="does not take bias"):
        tonemap(image, "reinhard", bias=0.8)
    with pytest.raises(ValueError, match="does not take white"):
        tonemap(image, "histogram", white=2.0)


def write_rgb_exr(path, rgb, alpha=None):
    channels = {name: rgb[..., index].astype(np.float32) for index, name in enumerate("RGB")}
    if alpha is not None:
        channels["A"] = alpha.astype(np.float32)
    write_exr(path, channels)


def test_tonemap_file_writes_the_display_image(tmp_path):
    rng = np.random.default_rng(10)
    radiance = 10.0 ** rng.uniform(-2, 2, (24, 36, 3))
    source = tmp_path / "shot.exr"
    write_rgb_exr(source, radiance)
    written = tonemap_file(source)
    assert written == tmp_path / "shot.png"  # contract: default output is IN with .png
    import imageio.v3 as iio

    assert np.array_equal(iio.imread(written), display_image(radiance))
    sixteen = tonemap_file(source, tmp_path / "out16.png", operator="drago", bits=16)
    assert sixteen.exists()


def test_tonemap_file_keeps_alpha(tmp_path):
    # Contract: alpha preserved if present. OpenEXR stores associated alpha: a half-covered pixel of
    # premultiplied colour 0.09 shows the straight colour 0.18.
    import imageio.v3 as iio

    radiance = np.full((4, 6, 3), 0.09)
    alpha = np.full((4, 6), 0.5)
    alpha[0, 0] = 0.0
    radiance[0, 0] = 0.0
    write_rgb_exr(tmp_path / "a.exr", radiance, alpha)
    image = iio.imread(tonemap_file(tmp_path / "a.exr", operator="clamp", exposure=0.0))
    assert image.shape == (4, 6, 4)
    assert image[1, 1].tolist() == [118, 118, 118, 128]  # sRGB(0.18) = 118 (IEC 61966-2-1), 0.5 -> 128
    assert image[0, 0, 3] == 0


def test_contact_sheet_has_every_operator_side_by_side(tmp_path):
    radiance = 10.0 ** np.random.default_rng(12).uniform(-2, 2, (40, 60, 3))
    sheet = contact_sheet(radiance, bias=0.7)
    count = len(OPERATORS)
    assert sheet.dtype == np.uint8 and sheet.shape[0] > 40
    assert sheet.shape[1] == count * 60 + (count - 1) * 8
    # The tiles are the operators' display images (no resampling when they fit).
    tile_top = sheet.shape[0] - 40
    assert np.array_equal(sheet[tile_top:, :60], display_image(radiance, "clamp"))
    assert np.array_equal(sheet[tile_top:, 2 * 68:2 * 68 + 60], display_image(radiance, "drago", bias=0.7))
    assert default_sheet_path(tmp_path / "x.exr") == tmp_path / "x-operators.png"


def run_command(argv):
    parser = argparse.ArgumentParser()
    tonemap_command.add_arguments(parser)
    return tonemap_command.run(parser.parse_args(argv))


def test_command_prints_the_path_and_reports_nonfinite(tmp_path, capsys):
    radiance = np.ones((8, 8, 3))
    radiance[3, 4] = np.nan
    write_rgb_exr(tmp_path / "in.exr", radiance)
    assert run_command([str(tmp_path / "in.exr"), "--operator", "drago", "--bias", "0.7"]) == 0
    captured = capsys.readouterr()
    assert captured.out.strip() == str(tmp_path / "in.png")
    assert "1 pixel with NaN or Inf" in captured.err and "(3, 4)" in captured.err
    assert run_command([str(tmp_path / "in.exr"), "--compare"]) == 0
    assert capsys.readouterr().out.strip() == str(tmp_path / "in-operators.png")


def test_command_user_errors(tmp_path):
    with pytest.raises(UserError, match="missing.exr: no such file"):
        run_command([str(tmp_path / "missing.exr")])
    write_rgb_exr(tmp_path / "in.exr", np.ones((2, 2, 3)))
    with pytest.raises(UserError, match="--bias 0.7: not used by --operator reinhard"):
        run_command([str(tmp_path / "in.exr"), "--bias", "0.7"])
    with pytest.raises(SystemExit):  # argparse: exit status 2 with the option named
        run_command([str(tmp_path / "in.exr"), "--key", "-1"])


def test_read_back_exr_equals_written_radiance(tmp_path):
    rng = np.random.default_rng(13)
    radiance = rng.uniform(0, 100, (5, 7, 3)).astype(np.float32)
    write_rgb_exr(tmp_path / "r.exr", radiance)
    channels, _ = read_exr(tmp_path / "r.exr")
    assert np.array_equal(np.stack([channels[c] for c in "RGB"], -1), radiance)


def test_output_never_overwrites_the_input(tmp_path):
    # Common practice: refuse to replace the source image with its preview.
    write_rgb_exr(tmp_path / "in.exr", np.ones((2, 2, 3)))
    with pytest.raises(UserError, match="overwrite the input"):
        tonemap_file(tmp_path / "in.exr", tmp_path / "in.exr")


def test_saturation_exponent():
    # Common practice (Schlick 1994; the usual Durand & Dorsey implementations): C_d = Ld (C / Y)^s.
    # s = 1 keeps the colour ratios; s = 0.5 takes the square root of each channel's ratio to Y.
    pixel = np.array([[[0.5, 1.0, 2.0]]])
    plain = reinhard(pixel, white=100.0)
    half = reinhard(pixel, white=100.0, saturation=0.5)
    y = 0.9659  # BT.709 luminance of (0.5, 1, 2), worked above
    display_y = y * (1 + y / 100.0**2) / (1 + y)
    assert np.allclose(half[0, 0], display_y * (pixel[0, 0] / y) ** 0.5, atol=FORMULA_TOLERANCE)
    assert np.ptp(half) < np.ptp(plain)
    for operator in ("drago", "durand", "histogram"):
        assert np.array_equal(tonemap(pixel, operator, saturation=1.0), tonemap(pixel, operator))

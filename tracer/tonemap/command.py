"""`tracer tonemap IN.exr [-o OUT.png] [options]`: the command-line face of `tracer.tonemap`.

Prints the path written on stdout; warnings (non-finite pixels) go to stderr, one line each.
Bad options and unreadable inputs raise `UserError` (the CLI exits with status 2).
"""

import argparse
import sys
import warnings

from tracer.errors import UserError

from . import (
    DEFAULT_OPERATOR,
    OPERATORS,
    NonFiniteWarning,
    contact_sheet_file,
    operator_parameters,
    tonemap_file,
)
from .exposure import DEFAULT_KEY

# Operator options of the command -> the operator parameter each sets.
_OPERATOR_OPTIONS = {
    "white": "--white",
    "saturation": "--saturation",
    "bias": "--bias",
    "contrast": "--contrast",
}


def _positive_float(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a number: {text!r}") from None
    if not (value > 0.0 and value != float("inf")):
        raise argparse.ArgumentTypeError(f"must be a positive number, got {text}")
    return value


def _finite_float(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a number: {text!r}") from None
    if value != value or value in (float("inf"), float("-inf")):
        raise argparse.ArgumentTypeError(f"must be a finite number, got {text}")
    return value


def _bias(text: str) -> float:
    value = _positive_float(text)
    if value > 1.0:
        raise argparse.ArgumentTypeError(f"must be in (0, 1], got {text}")
    return value


def _contrast(text: str) -> float:
    value = _positive_float(text)
    if value <= 1.0:
        raise argparse.ArgumentTypeError(f"must be above 1, got {text}")
    return value


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Add the options of `tracer tonemap` to `parser`."""
    parser.add_argument("input", metavar="IN.exr",
                        help="linear EXR with R, G, B channels (A kept if present)")
    parser.add_argument("-o", "--output", metavar="OUT.png",
                        help="PNG to write (default: IN with .png; with --compare: IN-operators.png)")
    parser.add_argument("--operator", choices=tuple(OPERATORS), default=DEFAULT_OPERATOR,
                        help=f"tone-mapping operator (default {DEFAULT_OPERATOR})")
    parser.add_argument("--exposure", metavar="EV", type=_finite_float,
                        help="multiply radiance by 2^EV before the operator (default: automatic, "
                             "log-average luminance to --key)")
    parser.add_argument("--key", type=_positive_float, default=DEFAULT_KEY,
                        help="automatic exposure: the log-average luminance maps to this "
                             f"(default {DEFAULT_KEY})")
    parser.add_argument("--white", metavar="L", type=_positive_float,
                        help="reinhard, drago: smallest luminance after exposure shown as white "
                             "(default: the image maximum)")
    parser.add_argument("--saturation", type=_positive_float,
                        help="colour saturation exponent of the luminance-based operators "
                             "(default 1: keep colour)")
    parser.add_argument("--bias", type=_bias, help="drago: bias b in (0, 1] (default 0.85)")
    parser.add_argument("--contrast", type=_contrast,
                        help="durand: target contrast of the base layer (default 5)")
    parser.add_argument("--bits", type=int, choices=(8, 16), default=8, help="PNG bit depth (default 8)")
    parser.add_argument("--dither", action="store_true",
                        help="add +-0.5 LSB triangular dither before quantising (seeded by --seed)")
    parser.add_argument("--seed", type=int, default=0, help="dither seed (default 0)")
    parser.add_argument("--compare", action="store_true",
                        help="write one contact sheet with every operator side by side instead")


def _operator_params(args: argparse.Namespace) -> dict:
    return {name: getattr(args, name) for name in _OPERATOR_OPTIONS if getattr(args, name, None) is not None}


def run(args: argparse.Namespace) -> int:
    """Run `tracer tonemap`; prints the path written; returns the exit status."""
    params = _operator_params(args)
    if not args.compare:
        accepted = operator_parameters(args.operator)
        for name, value in params.items():
            if name not in accepted:
                option = _OPERATOR_OPTIONS[name]
                raise UserError(f"{option} {value:g}: not used by --operator {args.operator}")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", NonFiniteWarning)
        if args.compare:
            written = contact_sheet_file(args.input, args.output, args.exposure, args.key, **params)
        else:
            white = params.pop("white", None)
            written = tonemap_file(args.input, args.output, args.operator, args.exposure, args.key, white,
                                   args.bits, args.dither, args.seed, **params)
    for warning in caught:
        if issubclass(warning.category, NonFiniteWarning):
            print(f"warning: {args.input}: {warning.message}", file=sys.stderr)
        else:
            warnings.showwarning(warning.message, warning.category, warning.filename, warning.lineno)
    print(written)
    return 0

"""Argument types shared by the commands."""

from __future__ import annotations

import argparse
import math
from pathlib import Path

from ..choices import is_zarr_path, output_suffix_refusal


def output_file(text: str) -> str:
    """An ``-o`` argument: a file name, not a directory, in a directory that exists
    (checked before any work: a mistyped directory is refused, not created; ``flowpipe
    run`` creates the tree it owns). An existing Zarr store under a ``.zarr`` name is
    replaced when the new one is complete, as a file is."""
    path = Path(text)
    parent = path.parent
    if parent.exists() and not parent.is_dir():
        raise argparse.ArgumentTypeError(f"{text!r}: {str(parent)!r} is not a directory; "
                                         "give a name in a directory")
    if not parent.exists():
        raise argparse.ArgumentTypeError(f"{text!r}: the directory {str(parent)!r} does not "
                                         "exist; create it first, or correct the name")
    if path.is_dir():
        if is_zarr_path(path):
            from ..ingest import is_zarr_store

            if is_zarr_store(path):
                return text
            raise argparse.ArgumentTypeError(f"{text!r} is a directory but not a Zarr store; "
                                             "give a new name or remove it")
        raise argparse.ArgumentTypeError(f"{text!r} is a directory; give a file name in it")
    return text


def data_file(text: str) -> str:
    """An ``-o`` argument of a command writing data: an :func:`output_file` named as a
    NetCDF file or a Zarr store (:func:`flowpipe.choices.output_suffix_refusal`)."""
    refusal = output_suffix_refusal(output_file(text))
    if refusal:
        raise argparse.ArgumentTypeError(refusal)
    return text


def add_quiet_option(parser: argparse.ArgumentParser) -> None:
    """``--quiet``: no progress bar on the terminal (there is none off a terminal)."""
    parser.add_argument("--quiet", action="store_true",
                        help="no progress bar (shown only when standard error is a terminal)")


def add_output_options(parser: argparse.ArgumentParser) -> None:
    """How the output stores its data (precision, compression, quantization; see
    :func:`flowpipe.write`) and ``--attribute KEY=VALUE`` (repeatable): a global
    attribute stamped on it."""
    from ..choices import COMPRESSIONS, PRECISIONS

    parser.add_argument("--precision", choices=PRECISIONS, default="input",
                        help="floating-point storage: as the input wind was stored (default; "
                        "float32 or packed 16-bit input gives single precision), single "
                        "(about 7 significant digits, half the size) or double")
    parser.add_argument("--compression", choices=COMPRESSIONS,
                        help="lossless compression: zlib with shuffle (default for NetCDF, level "
                        "1; every netCDF-4 reader), zstd (default for .zarr stores; for NetCDF "
                        "faster, but readers need netCDF-C 4.9 or later) or none")
    parser.add_argument("--compression-level", type=int, metavar="N",
                        help="zlib 1-9 or zstd 1-22 (default 1)")
    parser.add_argument("--significant-digits", type=int, metavar="N",
                        help="lossy: keep N significant decimal digits (GranularBitRound "
                        "quantization, recorded as CF 1.12 section 8.4 describes; relative "
                        "error at most 0.5*10^(1-N))")
    parser.add_argument("--attribute", action="append", type=attribute, default=[],
                        metavar="KEY=VALUE", help="a global attribute to stamp on the output "
                        "(institution, creator_name, license, project, id_prefix, ...); repeatable")


def output_options(args: argparse.Namespace) -> dict:
    """The keyword arguments of :func:`flowpipe.write` given by :func:`add_output_options`
    (checked before any work)."""
    from ..store import check_encoding

    options = {"precision": args.precision, "compression": args.compression,
               "compression_level": args.compression_level,
               "significant_digits": args.significant_digits}
    check_encoding(**options, output=getattr(args, "output", None))  # before any work
    return {**options, "attributes": dict(args.attribute)}


def attribute(text: str) -> tuple[str, str]:
    """One ``--attribute KEY=VALUE``."""
    from ..config import ATTRIBUTE_NAME

    key, sep, value = text.partition("=")
    if not sep or not ATTRIBUTE_NAME.match(key.strip()):
        raise argparse.ArgumentTypeError(
            f"{text!r}: give KEY=VALUE, KEY of letters, digits and underscores beginning with a "
            "letter, e.g. institution=\"Harbour Weather Office\"")
    return key.strip(), value


def add_max_speed_option(parser: argparse.ArgumentParser) -> None:
    """``--max-speed M_S``: the limit of plausible wind speeds."""
    from ..choices import DEFAULT_MAX_SPEED

    parser.add_argument("--max-speed", type=float, default=DEFAULT_MAX_SPEED, metavar="M_S",
                        help="largest plausible wind speed in m s-1 (default: "
                        f"{DEFAULT_MAX_SPEED:g}, above the largest speeds ever analysed)")


def add_input_options(parser: argparse.ArgumentParser) -> None:
    """Options of the plausibility check and the time series, shared by the commands
    that read winds (see :func:`flowpipe.ingest.open_wind`)."""
    from ..choices import IMPLAUSIBLE_CHOICES

    add_max_speed_option(parser)
    parser.add_argument("--implausible", choices=IMPLAUSIBLE_CHOICES, default="refuse",
                        help="winds that are not finite or faster than --max-speed: refuse "
                        "the input (default) or treat them as missing")
    parser.add_argument("--allow-gaps", action="store_true",
                        help="accept a time series with missing times (default: refused)")
    parser.add_argument("--members", type=members, metavar="N[,...]",
                        help="only these ensemble members (values of realization), e.g. 0,3")


    add_forecast_options(parser)


def add_forecast_options(parser: argparse.ArgumentParser) -> None:
    """``--run ISO|latest`` and ``--lead HOURS[,...]``: one forecast run, some lead times."""
    parser.add_argument("--run", metavar="ISO",
                        help="only this forecast run (forecast_reference_time), ISO 8601 such "
                        "as 2026-12-01T00Z, or \"latest\" for the newest present")
    parser.add_argument("--lead", type=leads, metavar="HOURS[,...]",
                        help="only these lead times (forecast_period) in hours, e.g. 0,24,48")


def leads(text: str) -> list[float]:
    """One ``--lead HOURS[,...]``: finite hours, not negative."""
    try:
        values = [float(item) for item in text.split(",") if item.strip()]
    except ValueError:
        values = []
    if not values or not all(math.isfinite(h) and h >= 0 for h in values):
        raise argparse.ArgumentTypeError(
            f"{text!r}: give lead times in hours, comma-separated, each 0 or more (e.g. 0,24)")
    return values


def members(text: str) -> list[int]:
    """One ``--members N[,...]``: ensemble member numbers."""
    try:
        values = [int(item) for item in text.split(",") if item.strip()]
    except ValueError:
        values = []
    if not values:
        raise argparse.ArgumentTypeError(f"{text!r}: give ensemble member numbers (values of "
                                         "realization), comma-separated, e.g. 0,3")
    return values


def forecast_options(args: argparse.Namespace) -> dict:
    """The keyword arguments of ``open_wind`` given by :func:`add_forecast_options`."""
    return {"run": args.run, "leads": args.lead}


def input_options(args: argparse.Namespace) -> dict:
    """The keyword arguments of ``open_wind`` given by :func:`add_input_options`."""
    return {"max_speed": args.max_speed, "implausible": args.implausible,
            "allow_gaps": args.allow_gaps, "members": args.members, **forecast_options(args)}

"""``flowpipe ftle``: finite-time Lyapunov exponent fields as a CF gridded file."""

from __future__ import annotations

import argparse

from ..errors import UsageError
from ._common import (
    add_forecast_options,
    add_output_options,
    data_file,
    forecast_options,
    output_options,
)


def register(sub: argparse._SubParsersAction, common: argparse.ArgumentParser) -> argparse.ArgumentParser:
    parser = sub.add_parser(
        "ftle", parents=[common], help="finite-time Lyapunov exponent fields",
        description="Seed a regular grid, advect it through the winds of FILE... and write "
        "the finite-time Lyapunov exponent (s-1). Analysis diagnostics, not a dispersion or "
        "warning product.")
    parser.add_argument("files", nargs="+", metavar="FILE", help="NetCDF files or globs")
    parser.add_argument("-o", "--output", required=True, type=data_file, metavar="OUT.nc")
    parser.add_argument("--hours", required=True, type=float, metavar="H",
                        help="integration time in hours")
    parser.add_argument("--backward", action="store_true", help="integrate backward in time")
    parser.add_argument("--spacing", type=float, metavar="DEG",
                        help="seed spacing (default: a quarter of the wind grid's)")
    parser.add_argument("--region", metavar="S,N,W,E", help="seeded region (default: all)")
    parser.add_argument("--level", metavar="L[,L...]", help="levels to seed (default: first)")
    parser.add_argument("--start", metavar="ISO", help="start time (ISO 8601)")
    parser.add_argument("--every", type=float, metavar="HOURS",
                        help="a series of start times this many hours apart")
    parser.add_argument("--steady", action="store_true",
                        help="treat the wind as frozen at its first time")
    parser.add_argument("--complete-only", action="store_true",
                        help="leave seeds whose parcels stopped early missing")
    parser.add_argument("--u", metavar="NAME")
    parser.add_argument("--v", metavar="NAME")
    add_output_options(parser)
    add_forecast_options(parser)
    return parser


def _numbers(text: str | None, option: str) -> list[float] | None:
    if text is None:
        return None
    try:
        return [float(x) for x in text.split(",")]
    except ValueError:
        raise UsageError(f"{option} {text!r}: give comma-separated numbers") from None


def run(args: argparse.Namespace) -> int:
    from ..ftle import ftle
    from ..ingest import open_wind
    from ..store import write

    options = output_options(args)
    wind = open_wind(args.files, u=args.u, v=args.v, **forecast_options(args))
    out = ftle(wind, hours=args.hours, backward=args.backward, spacing=args.spacing,
               region=_numbers(args.region, "--region"), levels=_numbers(args.level, "--level"),
               start=args.start, every=args.every, steady=args.steady,
               complete_only=args.complete_only)
    path = write(out, args.output, **options)
    print(f"wrote {path}: ftle on {out.sizes['latitude']} x {out.sizes['longitude']} seeds, "
          f"{out.sizes['time']} start time(s)"
          + (f", {out.sizes['realization']} members" if "realization" in out.dims else ""))
    return 0

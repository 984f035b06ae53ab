"""``flowpipe circulation FILE... -o OUT.nc --box/--circle/--polygon``: contour integrals."""

from __future__ import annotations

import argparse
import math
from typing import TYPE_CHECKING

from ..errors import UsageError
from ._common import (
    add_forecast_options,
    add_output_options,
    add_quiet_option,
    data_file,
    forecast_options,
    output_options,
)
from .decompose import _levels

if TYPE_CHECKING:  # the command's libraries are imported when it runs: --help stays quick
    import xarray as xr

    from ..progress import TaskBar


def _numbers(count: int, what: str):
    def parse(text: str) -> list[float]:
        try:
            values = [float(x) for x in text.split(",")]
        except ValueError:
            raise argparse.ArgumentTypeError(f"{text!r}: give {what}") from None
        if len(values) != count:
            raise argparse.ArgumentTypeError(f"{text!r}: give {what}")
        return values
    return parse


class _InOrder(argparse.Action):
    """Collect the contour options in ``contours`` as ``(kind, value)`` pairs, in the order
    the command line gives them (the output's contours follow it)."""

    def __call__(self, parser, namespace, values, option_string=None) -> None:
        namespace.contours = [*(getattr(namespace, "contours", None) or []), (self.const, values)]


def register(sub: argparse._SubParsersAction, common: argparse.ArgumentParser) -> argparse.ArgumentParser:
    parser = sub.add_parser(
        "circulation", parents=[common],
        help="circulation, outward flux and kinematic omega of closed contours",
        description="Line integrals of the wind around boxes, circles and polygons (circulation, "
        "outward flux), area means of gridded vorticity and divergence beside them, and the "
        "kinematic omega of each contour's column on pressure levels.",
    )
    parser.add_argument("files", nargs="+", metavar="FILE", help="NetCDF files or globs")
    parser.add_argument("-o", "--output", required=True, type=data_file, metavar="OUT.nc")
    parser.add_argument("--box", action=_InOrder, const="box", dest="contours", metavar="S,N,W,E",
                        type=_numbers(4, "S,N,W,E in degrees"),
                        help="box bounded by latitudes S, N and meridians W to E (eastward)")
    parser.add_argument("--circle", action=_InOrder, const="circle", dest="contours",
                        metavar="LAT,LON,RADIUS_KM",
                        type=_numbers(3, "LAT,LON,RADIUS_KM"), help="great-circle-radius circle")
    parser.add_argument("--polygon", action=_InOrder, const="polygon", dest="contours", metavar="FILE",
                        help="CSV of latitude,longitude vertices, or GeoJSON polygon")
    parser.add_argument("--follow", action=_InOrder, const="track", dest="contours", metavar="TRACK.csv",
                        help="a circle of --radius-km whose centre follows a track (CSV "
                        "time,latitude,longitude; interpolated in time along great circles)")
    parser.add_argument("--radius-km", type=float, metavar="R",
                        help="radius of the --follow circles in km")
    parser.add_argument("--levels", type=_levels, metavar="L1,L2,...", help="only these levels")
    parser.add_argument("--obrien", action="store_true",
                        help="O'Brien (1970) correction: omega brought to --top-omega at the top")
    parser.add_argument("--surface-omega", type=float, default=0.0, metavar="PA_S",
                        help="omega at the base of each column: the lowest level, or the "
                        "lowest with complete data above missing ones (default 0)")
    parser.add_argument("--top-omega", type=float, default=0.0, metavar="PA_S",
                        help="omega at the top level with --obrien (default 0)")
    parser.add_argument("--u", metavar="NAME", help="name of the eastward wind variable")
    parser.add_argument("--v", metavar="NAME", help="name of the northward wind variable")
    add_output_options(parser)
    add_forecast_options(parser)
    add_quiet_option(parser)
    return parser


def write_progress(result: xr.Dataset, quiet: bool) -> TaskBar:
    """Slabs of the wind integrated (one time and level: its line and area integrals, after
    its gridded vorticity and divergence), rate and time left; the notes of the regional
    solvers after them."""
    from ..progress import TaskBar, bar, key_name

    slabs = math.prod(n for d, n in result["circulation"].sizes.items() if d != "contour")
    return TaskBar(bar(slabs, "slab", quiet, desc="circulation"),
                   lambda key: key_name(key).lstrip("_").startswith("slab_integrals-"),
                   notes=True)


def run(args: argparse.Namespace) -> int:
    from ..contours import circulation, gather
    from ..ingest import open_wind
    from ..store import write

    options = output_options(args)
    given = args.contours or []
    if args.radius_km is not None and not any(kind == "track" for kind, _ in given):
        raise UsageError("--radius-km is the radius of --follow circles; give --follow TRACK.csv")
    contours = gather(given, args.radius_km)
    if not contours:
        raise UsageError("give at least one contour: --box, --circle, --polygon or --follow")
    wind = open_wind(args.files, u=args.u, v=args.v, **forecast_options(args))
    result = circulation(wind, contours, levels=args.levels, obrien=args.obrien,
                         surface_omega=args.surface_omega, top_omega=args.top_omega)
    with write_progress(result, args.quiet):
        path = write(result, args.output, **options)
    count = len(contours)
    print(f"wrote {path}: {count} contour{'' if count == 1 else 's'}")
    return 0

"""``flowpipe decompose FILE... -o OUT.nc``: the Helmholtz split of a wind, to NetCDF."""

from __future__ import annotations

import argparse
import math
from typing import TYPE_CHECKING

from ..choices import METHODS, SCHEMES
from ..errors import UsageError
from ._common import (
    add_input_options,
    add_output_options,
    add_quiet_option,
    data_file,
    input_options,
    output_options,
)

if TYPE_CHECKING:  # the command's libraries are imported when it runs: --help stays quick
    import xarray as xr

    from ..progress import TaskBar

def register(sub: argparse._SubParsersAction, common: argparse.ArgumentParser) -> argparse.ArgumentParser:
    parser = sub.add_parser(
        "decompose", parents=[common],
        help="streamfunction, velocity potential, vorticity, divergence, rotational and "
        "divergent winds",
        description="Split the wind into its rotational and divergent parts (Helmholtz "
        "decomposition) and write them, with vorticity and divergence, to CF NetCDF. Complete "
        "global grids use spherical harmonics; limited-area or gappy grids the regional solver.",
    )
    parser.add_argument("files", nargs="+", metavar="FILE", help="NetCDF files or globs")
    parser.add_argument("-o", "--output", required=True, type=data_file, metavar="OUT.nc",
                        help="file to write")
    parser.add_argument("--method", choices=METHODS, default="auto",
                        help="spectral (complete global grids), regional, or auto (default)")
    parser.add_argument("--truncation", type=int, metavar="N",
                        help="triangular truncation of the spectral method (default: the "
                        "largest the grid resolves)")
    parser.add_argument("--levels", type=_levels, metavar="L1,L2,...",
                        help="only these levels, comma-separated, in the file's level units "
                        "after conversion (hPa or m)")
    parser.add_argument("--scheme", choices=SCHEMES, default="variational",
                        help="limited-area scheme of the regional method (default: variational)")
    parser.add_argument("--kinematics", action="store_true",
                        help="also write absolute vorticity, deformation and kinetic-energy "
                        "diagnostics with their spectra (spectral method only)")
    parser.add_argument("--fields", type=_names, metavar="NAME,...",
                        help="write only these variables (quality figures are always kept); "
                        "besides the decomposition's: wind_speed, wind_from_direction and "
                        "their rotational_ and divergent_ counterparts")
    parser.add_argument("--u", metavar="NAME", help="name of the eastward wind variable")
    parser.add_argument("--v", metavar="NAME", help="name of the northward wind variable")
    add_output_options(parser)
    add_input_options(parser)
    add_quiet_option(parser)
    return parser


def write_progress(parts: xr.Dataset, quiet: bool) -> TaskBar:
    """Slabs written (one slab: a time and level of every variable), rate and time left,
    from the tasks that store the computed chunks; the notes of the solvers after them
    (the iterations of the slab being solved), which move while a slab takes minutes."""
    from ..progress import TaskBar, bar, key_name
    from ..store import WHOLE_DIMS, WRITE_TASKS

    slabs = math.prod(parts.sizes.get(d, 1) for d in parts.dims if d not in WHOLE_DIMS)
    return TaskBar(bar(slabs, "slab", quiet, desc="decompose"),
                   lambda key: any(name in key_name(key) for name in WRITE_TASKS), notes=True)


def _names(text: str) -> list[str]:
    names = [item.strip() for item in text.split(",") if item.strip()]
    if not names:
        raise argparse.ArgumentTypeError("give at least one variable name, e.g. "
                                         "streamfunction,velocity_potential")
    return names


def _levels(text: str) -> list[float]:
    try:
        values = [float(item) for item in text.split(",") if item.strip()]
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"{text!r} is not a comma-separated list of numbers, e.g. 850,500") from None
    if not values:
        raise argparse.ArgumentTypeError("give at least one level, e.g. 850,500")
    return values


def run(args: argparse.Namespace) -> int:
    import xarray as xr

    from ..decompose import decompose
    from ..fields import select_fields
    from ..ingest import input_notes, open_wind
    from ..kinematics import kinematics
    from ..store import write

    options = output_options(args)
    wind = open_wind(args.files, u=args.u, v=args.v, **input_options(args))
    parts = decompose(wind, method=args.method, truncation=args.truncation, levels=args.levels,
                      scheme=args.scheme)
    if args.kinematics:
        if parts.attrs.get("method") != "spectral":
            raise UsageError("--kinematics needs the spectral method (a complete global grid "
                             "without missing values); drop --kinematics")
        extra = kinematics(wind, truncation=args.truncation, levels=args.levels)
        if args.fields is not None and not set(args.fields) & set(extra.data_vars):
            raise UsageError(f"--fields names none of the variables --kinematics adds "
                             f"({', '.join(map(str, extra.data_vars))}); name some of them "
                             "or drop --kinematics")
        parts = xr.merge([parts, extra], combine_attrs="override")
    parts = select_fields(parts, wind, args.fields)
    parts.attrs.update(input_notes(wind))
    with write_progress(parts, args.quiet):
        path = write(parts, args.output, **options)
    print(f"wrote {path}: {len(parts.data_vars)} variables by the "
          f"{parts.attrs.get('method', '')} method")
    return 0

"""``flowpipe advect``: parcel trajectories written as a CF trajectory file."""

from __future__ import annotations

import argparse
from typing import TYPE_CHECKING

from ..choices import STATUS_MEANINGS
from ._common import (
    add_input_options,
    add_output_options,
    add_quiet_option,
    data_file,
    input_options,
    output_options,
)

if TYPE_CHECKING:  # the command's libraries are imported when it runs: --help stays quick
    import pandas as pd
    import xarray as xr

    from ..progress import TaskBar


def register(sub: argparse._SubParsersAction, common: argparse.ArgumentParser) -> argparse.ArgumentParser:
    parser = sub.add_parser(
        "advect", parents=[common], help="follow air parcels forward or backward in time",
        description="Follow air parcels through the winds of FILE... (one time series, read a "
        "time slice at a time) and write their trajectories as a CF trajectory file. "
        "Trajectories are analysis diagnostics, not a dispersion or warning product.",
    )
    parser.add_argument("files", nargs="+", metavar="FILE", help="NetCDF files or globs")
    parser.add_argument("-o", "--output", required=True, type=data_file, metavar="OUT.nc",
                        help="the trajectory file to write")
    where = parser.add_mutually_exclusive_group(required=True)
    where.add_argument("--start", action="append", metavar="LAT,LON[,LEVEL]",
                       help="a start point (repeatable); LEVEL in hPa or m as the input's levels")
    where.add_argument("--starts", metavar="FILE.csv",
                       help="start points: a header row latitude,longitude[,level][,time]")
    parser.add_argument("--hours", required=True, type=float, metavar="H",
                        help="length of each trajectory in hours")
    parser.add_argument("--backward", action="store_true",
                        help="integrate backward in time (where did the air come from)")
    parser.add_argument("--step-minutes", type=float, metavar="M",
                        help="integration step (default: a Courant-number rule)")
    parser.add_argument("--sample", metavar="VAR,...",
                        help="input variables to interpolate along the trajectories, by "
                        "flowpipe's name or the input file's (omega or OMEGA)")
    parser.add_argument("--vertical", choices=("omega", "w"),
                        help="3-D trajectories with this vertical velocity (default: parcels "
                        "stay on their level)")
    parser.add_argument("--steady", action="store_true",
                        help="treat the wind as frozen at its first time (needed for one time)")
    parser.add_argument("--scheme", choices=("rk4", "petterssen"), default="rk4",
                        help="integration scheme (default: fourth-order Runge-Kutta)")
    parser.add_argument("--u", metavar="NAME", help="name of the eastward wind variable")
    parser.add_argument("--v", metavar="NAME", help="name of the northward wind variable")
    add_output_options(parser)
    add_input_options(parser)
    add_quiet_option(parser)
    return parser


def slice_progress(wind: xr.Dataset, starts: pd.DataFrame, hours: float, backward: bool,
                   quiet: bool) -> TaskBar:
    """Input time slices read (the integration walks through them in time, one dask
    computation each), rate and time left. Out of those the trajectories span from the
    default start (the first time, or the last one backward); out of all when the starts
    give their own times."""
    import numpy as np

    from ..progress import TaskBar, bar

    times = wind["time"].values if "time" in wind.dims else np.zeros(1, "datetime64[s]")
    total = times.size
    if "time" not in starts or starts["time"].isna().all():
        span = np.timedelta64(int(round(hours * 3600)), "s")
        if backward:
            total = times.size - int(np.searchsorted(times, times[-1] - span, side="right")) + 1
        else:
            total = int(np.searchsorted(times, times[0] + span, side="left")) + 1
    return TaskBar(bar(min(total, times.size), "time slice", quiet, desc="advect"))


def run(args: argparse.Namespace) -> int:
    import numpy as np
    import pandas as pd

    from ..ingest import input_notes, open_wind
    from ..parcels import advect, read_starts
    from ..parcels.starts import parse_start
    from ..store import write

    options = output_options(args)
    if args.starts:
        starts = read_starts(args.starts)
    else:
        starts = pd.DataFrame([parse_start(text, i) for i, text in enumerate(args.start, 1)])
    wind = open_wind(args.files, u=args.u, v=args.v, **input_options(args))
    sample = [name.strip() for name in args.sample.split(",") if name.strip()] \
        if args.sample else []
    with slice_progress(wind, starts, args.hours, args.backward, args.quiet):
        tracks = advect(wind, starts, hours=args.hours, backward=args.backward,
                        step_minutes=args.step_minutes, vertical=args.vertical, sample=sample,
                        steady=args.steady, scheme=args.scheme)
    tracks.attrs.update(input_notes(wind))
    path = write(tracks, args.output, **options)
    counts = np.bincount(tracks["status"].values, minlength=len(STATUS_MEANINGS))
    summary = ", ".join(f"{meaning.replace('_', ' ')} {count}"
                        for meaning, count in zip(STATUS_MEANINGS, counts, strict=True) if count)
    n = tracks.sizes["trajectory"]
    print(f"wrote {path}: {n} {'trajectory' if n == 1 else 'trajectories'} ({summary})")
    return 0

"""``flowpipe map FILE.nc -o OUT.png``: draw a field or the trajectories of a file."""

from __future__ import annotations

import argparse
import re

from ..choices import PROJECTIONS
from ..errors import UsageError
from ._common import add_forecast_options, output_file


def register(sub: argparse._SubParsersAction, common: argparse.ArgumentParser) -> argparse.ArgumentParser:
    parser = sub.add_parser(
        "map", parents=[common], help="draw a map of a field or of trajectories to an image",
        description="Draw one horizontal slab of a field (filled contours, with the matching "
        "wind as arrows or barbs) or the tracks of a trajectory file, and write it as an image "
        "(PNG, or the format the output name's suffix gives: .pdf, .svg, ...).",
    )
    parser.add_argument("file", metavar="FILE.nc", help="a flowpipe output or any CF NetCDF file")
    parser.add_argument("-o", "--output", required=True, type=output_file, metavar="OUT.png",
                        help="the image to write (written atomically; the suffix gives the "
                        "format)")
    parser.add_argument("--field", metavar="NAME",
                        help="variable to draw (default: streamfunction, velocity_potential, "
                        "vorticity or divergence, else the first mappable one); for "
                        "trajectories, a sampled variable to colour the tracks by; flowpipe's "
                        "name or the input file's (such as u10 for a GRIB file's u)")
    parser.add_argument("--level", type=float, metavar="L",
                        help="vertical level, in the file's units (default: the first)")
    parser.add_argument("--time", metavar="T", help="valid time, ISO 8601 (default: the first)")
    add_forecast_options(parser)
    parser.add_argument("--member", type=int, metavar="N",
                        help="ensemble member (value of realization): its field, or only its "
                        "tracks (default: the first member's field, every member's tracks)")
    parser.add_argument("--projection", choices=PROJECTIONS, default="auto",
                        help="map projection (default: chosen from the domain)")
    parser.add_argument("--size", type=parse_size, default=(1200, 800), metavar="WxH",
                        help="image size in pixels (default: 1200x800)")
    parser.add_argument("--barbs", action="store_true",
                        help="draw the wind as barbs in knots (pennant 50, barb 10, half 5) "
                        "instead of arrows")
    parser.add_argument("--marks", type=float, default=6.0, metavar="HOURS",
                        help="trajectories: a dot every HOURS of travel (default: 6)")
    return parser


#: Largest width or height of a map in pixels (a 10000 x 10000 RGBA image takes 400 MB).
MAX_PIXELS = 10000


def parse_size(text: str) -> tuple[int, int]:
    """``1200x800`` -> (1200, 800)."""
    match = re.fullmatch(r"\s*(\d+)\s*[xX]\s*(\d+)\s*", text)
    if not match or min(int(match[1]), int(match[2])) < 100 \
            or max(int(match[1]), int(match[2])) > MAX_PIXELS:
        raise argparse.ArgumentTypeError(
            f"{text!r}: give WIDTHxHEIGHT in pixels, each from 100 to {MAX_PIXELS} (for "
            "example 1200x800)")
    return int(match[1]), int(match[2])


def run(args: argparse.Namespace) -> int:
    from ..maps import image_format, plain_text, render, save

    if args.lead and len(args.lead) > 1:
        raise UsageError("a map shows one lead time: give --lead HOURS once (one value)")
    image_format(args.output)  # before any work
    if not args.marks > 0:
        raise UsageError(f"--marks {args.marks:g}: give the hours between time marks, above 0")
    figure = render(args.file, field=args.field, level=args.level, time=args.time,
                    run=args.run, lead=args.lead[0] if args.lead else None, member=args.member,
                    projection=args.projection, size=args.size, barbs=args.barbs,
                    marks_hours=args.marks)
    path = save(figure, args.output, protect=(args.file,))
    title = next((ax.get_title(loc="left") for ax in figure.axes if ax.get_title(loc="left")), "")
    print(f"wrote {path}: {plain_text(title.splitlines()[0]) if title else 'map'}")
    return 0

"""``flowpipe circulation FILE... -o OUT.nc --box/--circle/--polygon``: contour integrals."""

from __future__ import annotations

import argparse
import csv
import json
from pathlib import Path

from ..contours import box, circle, circulation, polygon
from ..errors import InputError
from ..ingest import open_wind
from ..store import write
from ._common import add_attribute_option, output_file
from .decompose import _levels


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


def register(sub: argparse._SubParsersAction, common: argparse.ArgumentParser) -> argparse.ArgumentParser:
    parser = sub.add_parser(
        "circulation", parents=[common],
        help="circulation, outward flux and kinematic omega of closed contours",
        description="Line integrals of the wind around boxes, circles and polygons (circulation, "
        "outward flux), area means of gridded vorticity and divergence beside them, and the "
        "kinematic omega of each contour's column on pressure levels.",
    )
    parser.add_argument("files", nargs="+", metavar="FILE", help="NetCDF files or globs")
    parser.add_argument("-o", "--output", required=True, type=output_file, metavar="OUT.nc")
    parser.add_argument("--box", action="append", default=[], metavar="S,N,W,E",
                        type=_numbers(4, "S,N,W,E in degrees"),
                        help="box bounded by latitudes S, N and meridians W to E (eastward)")
    parser.add_argument("--circle", action="append", default=[], metavar="LAT,LON,RADIUS_KM",
                        type=_numbers(3, "LAT,LON,RADIUS_KM"), help="great-circle-radius circle")
    parser.add_argument("--polygon", action="append", default=[], metavar="FILE",
                        help="CSV of latitude,longitude vertices, or GeoJSON polygon")
    parser.add_argument("--levels", type=_levels, metavar="L1,L2,...", help="only these levels")
    parser.add_argument("--obrien", action="store_true",
                        help="O'Brien (1970) correction: omega brought to --top-omega at the top")
    parser.add_argument("--surface-omega", type=float, default=0.0, metavar="PA_S",
                        help="omega at the lowest level (default 0)")
    parser.add_argument("--top-omega", type=float, default=0.0, metavar="PA_S",
                        help="omega at the top level with --obrien (default 0)")
    parser.add_argument("--u", metavar="NAME", help="name of the eastward wind variable")
    parser.add_argument("--v", metavar="NAME", help="name of the northward wind variable")
    add_attribute_option(parser)
    return parser


def read_polygon(path: str):
    """A polygon from a CSV (latitude,longitude per line, optional header) or GeoJSON."""
    p = Path(path)
    try:
        text = p.read_text()
    except OSError as exc:
        raise InputError(f"{path}: cannot read polygon file ({exc.strerror})") from None
    try:
        if p.suffix.lower() in (".json", ".geojson"):
            data = json.loads(text)
            geom = data.get("features", [data])[0] if data.get("type") == "FeatureCollection" else data
            geom = geom.get("geometry", geom)
            ring = geom["coordinates"][0]
            lon, lat = zip(*[(float(x[0]), float(x[1])) for x in ring], strict=True)
        else:
            rows = [r for r in csv.reader(text.splitlines()) if r and r[0].strip()]
            if rows and not _is_number(rows[0][0]):
                rows = rows[1:]
            lat, lon = zip(*[(float(r[0]), float(r[1])) for r in rows], strict=True)
    except (ValueError, KeyError, IndexError, TypeError):
        raise InputError(f"{path}: not a CSV of latitude,longitude vertices nor a GeoJSON "
                         "polygon") from None
    if len(lat) > 1 and (lat[0], lon[0]) == (lat[-1], lon[-1]):
        lat, lon = lat[:-1], lon[:-1]
    return polygon(lat, lon, name=p.stem)


def _is_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def run(args: argparse.Namespace) -> int:
    contours = ([box(*b) for b in args.box] + [circle(*c) for c in args.circle]
                + [read_polygon(p) for p in args.polygon])
    if not contours:
        from ..errors import UsageError
        raise UsageError("give at least one contour: --box, --circle or --polygon")
    wind = open_wind(args.files, u=args.u, v=args.v)
    result = circulation(wind, contours, levels=args.levels, obrien=args.obrien,
                         surface_omega=args.surface_omega, top_omega=args.top_omega)
    path = write(result, args.output, attributes=dict(args.attribute))
    count = len(contours)
    print(f"wrote {path}: {count} contour{'' if count == 1 else 's'}")
    return 0

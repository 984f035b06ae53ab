"""``flowpipe inspect FILE... [--json]``: what flowpipe finds in each file."""

from __future__ import annotations

import argparse
import json

from ._common import add_max_speed_option


def register(sub: argparse._SubParsersAction, common: argparse.ArgumentParser) -> argparse.ArgumentParser:
    parser = sub.add_parser(
        "inspect", parents=[common], help="describe the wind, grid and times found in files",
        description="Describe the wind variables, grid, levels and times flowpipe finds in "
        "each file, how many points are missing, and winds that are not finite or faster "
        "than --max-speed (described, not refused).",
    )
    parser.add_argument("files", nargs="+", metavar="FILE", help="NetCDF files or globs")
    parser.add_argument("--json", action="store_true", help="print one JSON object per file")
    parser.add_argument("--u", metavar="NAME", help="name of the eastward wind variable")
    parser.add_argument("--v", metavar="NAME", help="name of the northward wind variable")
    add_max_speed_option(parser)
    return parser


def run(args: argparse.Namespace) -> int:
    from ..ingest import expand_paths
    from ..inspection import inspect_file

    for path in expand_paths(args.files):  # one report per file, globs expanded here too
        report = inspect_file(path, u=args.u, v=args.v, max_speed=args.max_speed)
        if args.json:
            print(json.dumps(report))
        else:
            print(format_report(report))
    return 0


def _pole_text(pole_rows: list[str]) -> str:
    if len(pole_rows) == 2:
        return " with pole rows"
    return f" with a {pole_rows[0]} pole row" if pole_rows else ""


def _implausible_text(found: dict) -> str:
    """The implausible winds in words, with how to declare a missing-value marker."""
    from ..ingest import TREAT_AS_MISSING

    names = list(found["values"])
    shown = ", ".join(f"{name} {value:g} ({'once' if count == 1 else f'{count} times'})"
                      for name, pairs in found["values"].items() for value, count in pairs)
    text = (f"{found['points']} point(s) of {'/'.join(names)} not finite or faster than "
            f"{found['max_speed']:g} m s-1 (--max-speed), the first at {found['first']}; "
            + (f"values beyond the limit: {shown}" if shown else
               "no component alone is beyond the limit, their speed is"))
    marker = found["marker"]
    if marker is not None:
        text += (f"; {marker:g} repeats: it looks like a missing-value marker the file does "
                 f"not declare; declare it with the attribute missing_value = {marker:g} (or "
                 f"_FillValue) on {' and '.join(names)} (CF 1.11 section 2.5.1)")
    return text + f"; or let the commands {TREAT_AS_MISSING}"


def format_report(report: dict) -> str:
    """The short human-readable summary of one file."""
    levels = report["levels"]
    if not levels:
        level_text = "no vertical dimension"
    elif report["level_units"] is None:
        level_text = (f"{len(levels)} levels ({', '.join(f'{x:g}' for x in levels)}) of "
                      "unknown kind: the level coordinate has no units")
    else:
        level_text = (f"{len(levels)} {report['level_type']} levels "
                      f"({', '.join(f'{x:g}' for x in levels)} {report['level_units']})")
    vertical = report["vertical_velocity"] or "none"
    missing = ", ".join(f"{k} {n}" for k, n in report["missing"].items())
    lines = [
        f"{report['file']}",
        f"  wind       u = {report['u']}, v = {report['v']} (vertical velocity: {vertical})",
        f"  grid       {report['grid']}, {report['latitudes']} latitudes"
        f"{_pole_text(report['pole_rows'])}, {report['nlat']} x {report['nlon']}"
        f" (lat {report['latitude_range'][0]:g}..{report['latitude_range'][1]:g},"
        f" lon {report['longitude_range'][0]:g}..{report['longitude_range'][1]:g})",
        f"  vertical   {level_text}",
        f"  time       {report['times']} times"
        + (f", {report['time_range'][0]} .. {report['time_range'][1]} ({report['calendar']})"
           if report["times"] else ""),
        f"  missing    {missing}",
    ]
    if report.get("runs") or report.get("leads"):
        runs = report["runs"] or []
        described = (f" (times above: run {report['run']})"
                     if len(runs) > 1 and report["run"] else "")
        lines.insert(-1, f"  forecast   {len(runs)} run{'s' if len(runs) != 1 else ''}"
                     f"{' ' + ', '.join(runs) if runs else ''}; leads "
                     f"{', '.join(f'{h:g}' for h in report['leads'] or [])} h{described}")
    if report.get("members"):
        members = report["realizations"]
        lines.insert(-1, f"  ensemble   {report['members']} member"
                     f"{'s' if report['members'] != 1 else ''} (realization "
                     f"{members[0]}{'' if len(members) == 1 else f'..{members[-1]}'})")
    if report["implausible"]:
        lines.append(f"  implausible {_implausible_text(report['implausible'])}")
    if report["other_variables"]:
        lines.append(f"  also       {', '.join(report['other_variables'])}")
    return "\n".join(lines)

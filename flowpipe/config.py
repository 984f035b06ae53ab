"""The batch configuration (TOML): its schema, defaults and error messages.

Every key is documented in ``configs/README.md``. Paths are relative to the
config file. Unknown keys, wrong types and values out of range or not among
the choices of the library are errors that name the key and the line it is
on, raised before anything is written.
"""

from __future__ import annotations

import glob
import math
import os
import re
import tomllib
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from .choices import (
    COMPRESSIONS,
    DEFAULT_MAX_SPEED,
    IMPLAUSIBLE_CHOICES,
    METHODS,
    PRECISIONS,
    REGIONAL_VARIABLES,
    SPECTRAL_VARIABLES,
    VERTICAL,
    WIND_PRODUCTS,
    encoding_refusal,
    is_zarr_path,
    output_suffix_refusal,
)
from .choices import SCHEMES as REGIONAL_SCHEMES
from .errors import InputError, UsageError


class ConfigError(UsageError):
    """A config file that cannot be used as it is (exit code 2)."""


# table -> key -> (accepted types, default); a default of REQUIRED must be given.
REQUIRED = object()
_NUMBER = (int, float)
SCHEMA: dict[str, dict[str, tuple[tuple[type, ...], Any]]] = {
    "input": {
        "paths": ((list,), REQUIRED),
        "u": ((str,), None),
        "v": ((str,), None),
        "combine": ((bool,), False),
        "name": ((str,), "series"),
        "max_speed": (_NUMBER, DEFAULT_MAX_SPEED),
        "implausible": ((str,), "refuse"),
        "allow_gaps": ((bool,), False),
        "run": ((str,), None),
        "leads": ((list,), None),
        "members": ((list,), None),
    },
    "decompose": {
        "method": ((str,), "auto"),
        "scheme": ((str,), "variational"),
        "truncation": ((int,), None),
        "levels": ((list,), None),
        "fields": ((list,), None),
        "output": ((str,), "{stem}_decomposition.nc"),
    },
    "advect": {
        "starts": ((list,), None),
        "starts_file": ((str,), None),
        "hours": (_NUMBER, REQUIRED),
        "backward": ((bool,), False),
        "step_minutes": (_NUMBER, None),
        "vertical": ((str,), None),
        "sample": ((list,), []),
        "output": ((str,), "{stem}_trajectories.nc"),
    },
    "ftle": {
        "hours": (_NUMBER, REQUIRED),
        "backward": ((bool,), False),
        "spacing": (_NUMBER, None),
        "region": ((list,), None),
        "levels": ((list,), None),
        "output": ((str,), "{stem}_ftle.nc"),
    },
    "circulation": {
        "boxes": ((list,), []),
        "circles": ((list,), []),
        "polygons": ((list,), []),
        "tracks": ((list,), []),
        "track_radius_km": (_NUMBER, None),
        "levels": ((list,), None),
        "obrien": ((bool,), False),
        "surface_omega": (_NUMBER, 0.0),
        "top_omega": (_NUMBER, 0.0),
        "output": ((str,), "{stem}_circulation.nc"),
    },
    "maps": {
        "fields": ((list,), ["streamfunction", "velocity_potential"]),
        "levels": ((list,), None),
        "trajectories": ((bool,), True),
        "ftle": ((bool,), True),
        "circulation": ((bool,), True),
        "output": ((str,), "{stem}_{field}_{level}.png"),
    },
    "output": {
        "directory": ((str,), REQUIRED),
        "precision": ((str,), "input"),
        "compression": ((str,), None),
        "compression_level": ((int,), None),
        "significant_digits": ((int,), None),
    },
    "run": {
        "workers": ((int,), None),
        "scheduler": ((str,), None),
    },
    # global attributes stamped on every output: any attribute name, text values
    "metadata": {},
}

#: A netCDF attribute name flowpipe accepts from a site (letters, digits, underscores;
#: NetCDF User Guide, "Naming conventions", restricted as CF 1.11 section 2.3 recommends).
ATTRIBUTE_NAME = re.compile(r"^[A-Za-z][A-Za-z0-9_]*$")


@dataclass(frozen=True)
class Allowed:
    """The values a key accepts beyond its type.

    Attributes
    ----------
    test : callable
        True for an allowed value (for an allowed item, with ``each``).
    wording : str
        What ``test`` allows, as messages say it ("a number above 0").
    each : bool
        The value is a list and ``test`` applies to each of its items.
    empty : bool
        With ``each``: whether the list may be empty.
    """

    test: Callable[[Any], bool]
    wording: str
    each: bool = False
    empty: bool = True


def _one_of(choices: Iterable[str], each: bool = False) -> Allowed:
    """Exactly one of ``choices`` (for each item of a list, with ``each``)."""
    names = tuple(choices)
    return Allowed(lambda value: value in names, f"one of {', '.join(names)}", each=each)


def _finite(value: Any) -> bool:
    """A TOML integer or float that is neither a bool nor nan nor infinite."""
    return isinstance(value, _NUMBER) and not isinstance(value, bool) and math.isfinite(value)


def _iso_time(text: str) -> bool:
    """An ISO 8601 time (as ``--run`` takes it)."""
    from .ingest import parse_iso

    try:
        parse_iso(text, "run")
    except InputError:
        return False
    return True


def _start(value: Any) -> bool:
    """A start point [lat, lon] or [lat, lon, level] that is a position on the sphere."""
    return (isinstance(value, list) and len(value) in (2, 3) and all(map(_finite, value))
            and -90 <= value[0] <= 90)


_POSITIVE = Allowed(lambda x: math.isfinite(x) and x > 0, "a finite number above 0")
_AT_LEAST_1 = Allowed(lambda n: n >= 1, "at least 1")
# table -> key -> the values it accepts once its type is right (library constants for choices).
VALUES: dict[str, dict[str, Allowed]] = {
    "input": {
        "paths": Allowed(lambda p: isinstance(p, str), "a string", each=True, empty=False),
        "max_speed": Allowed(lambda x: _finite(x) and x > 0, "a number above 0 (m s-1)"),
        "implausible": _one_of(IMPLAUSIBLE_CHOICES),
        "run": Allowed(lambda r: r == "latest" or _iso_time(r),
                       "\"latest\" or an ISO 8601 time such as \"2026-12-01T00Z\""),
        "leads": Allowed(lambda h: _finite(h) and h >= 0, "a lead time in hours, 0 or more",
                         each=True, empty=False),
        "members": Allowed(lambda m: isinstance(m, int) and not isinstance(m, bool),
                           "an ensemble member number (a value of realization)", each=True,
                           empty=False),
    },
    "decompose": {
        "method": _one_of(METHODS),
        "scheme": _one_of(REGIONAL_SCHEMES),
        "truncation": _AT_LEAST_1,
        "levels": Allowed(_finite, "a finite number", each=True, empty=False),
        "fields": Allowed(lambda name: isinstance(name, str) and name != "",
                          "a variable name (a non-empty string)", each=True, empty=False),
    },
    "advect": {
        "starts": Allowed(_start, "[lat, lon] or [lat, lon, level] of finite numbers with lat "
                          "within -90..90", each=True, empty=False),
        "hours": _POSITIVE,
        "step_minutes": _POSITIVE,
        "vertical": _one_of(VERTICAL),
        "sample": Allowed(lambda name: isinstance(name, str) and name != "",
                          "a variable name (a non-empty string)", each=True),
    },
    "ftle": {
        "hours": _POSITIVE,
        "spacing": _POSITIVE,
        "region": Allowed(lambda r: len(r) == 4 and all(map(_finite, r)),
                          "[south, north, west, east] of finite numbers"),
        "levels": Allowed(_finite, "a finite number", each=True, empty=False),
    },
    "circulation": {
        "boxes": Allowed(lambda b: isinstance(b, list) and len(b) == 4 and all(map(_finite, b)),
                         "[south, north, west, east] of finite numbers", each=True),
        "circles": Allowed(lambda c: isinstance(c, list) and len(c) == 3 and all(map(_finite, c)),
                           "[lat, lon, radius_km] of finite numbers", each=True),
        "polygons": Allowed(lambda name: isinstance(name, str) and name != "",
                            "a file name (CSV or GeoJSON)", each=True),
        "tracks": Allowed(lambda name: isinstance(name, str) and name != "",
                          "a file name (CSV time,latitude,longitude)", each=True),
        "track_radius_km": _POSITIVE,
        "levels": Allowed(_finite, "a finite number", each=True, empty=False),
        "surface_omega": Allowed(_finite, "a finite number (Pa s-1)"),
        "top_omega": Allowed(_finite, "a finite number (Pa s-1)"),
    },
    "maps": {
        "levels": Allowed(_finite, "a finite number", each=True),
    },
    "output": {
        "precision": _one_of(PRECISIONS),
        "compression": _one_of(COMPRESSIONS),
    },
    "run": {
        "workers": _AT_LEAST_1,
    },
}
STAGES = ("decompose", "advect", "ftle", "circulation", "maps")
#: Keys of ``[output]`` that say how every output stores its data (see flowpipe.write).
STORAGE_KEYS = ("precision", "compression", "compression_level", "significant_digits")
TEMPLATE_FIELDS = {
    "decompose": {"stem", "run", "lead"},
    "advect": {"stem", "run", "lead"},
    "ftle": {"stem", "run", "lead"},
    "circulation": {"stem", "run", "lead"},
    "maps": {"stem", "field", "level", "time", "run", "lead", "member"},
}


@dataclass
class Config:
    """A validated batch configuration."""

    path: Path
    tables: dict[str, dict[str, Any]]
    inputs: list[Path] = field(default_factory=list)

    @property
    def output_dir(self) -> Path:
        return (self.path.parent / self.tables["output"]["directory"]).resolve()

    def has(self, stage: str) -> bool:
        return stage in self.tables

    @property
    def stages(self) -> tuple[str, ...]:
        """The stages this config runs, in their order."""
        return tuple(stage for stage in STAGES if stage in self.tables)

    def section(self, stage: str) -> dict[str, Any]:
        return self.tables[stage]


def _line_of(text: str, table: str | None, key: str | None) -> int | None:
    """The line of ``key`` in ``[table]`` (or of the table header), 1-based."""
    current = None
    for number, line in enumerate(text.splitlines(), start=1):
        stripped = line.strip()
        header = re.match(r"^\[([^\[\]]+)\]", stripped)
        if header:
            current = header.group(1).strip()
            if key is None and current == table:
                return number
            continue
        if key is not None and current == table and re.match(rf"^{re.escape(key)}\s*=", stripped):
            return number
    return None


def _where(path: Path, text: str, table: str, key: str | None) -> str:
    line = _line_of(text, table, key)
    return f"{path}" + (f" line {line}" if line else "")


def _type_name(types: tuple[type, ...]) -> str:
    names = {bool: "true/false", int: "an integer", float: "a number", str: "a string",
             list: "a list"}
    return " or ".join(names[t] for t in types)


def _refusal(what: str, value: Any, allowed: Allowed) -> str | None:
    """Why ``value`` of ``what`` (``[table] key``) is refused, or None when it is allowed."""
    if not allowed.each:
        return None if allowed.test(value) else f"{what} must be {allowed.wording}, not {value!r}"
    if not value and not allowed.empty:
        return f"{what} must hold at least one item ({allowed.wording}), not []"
    for item in value:
        if not allowed.test(item):
            return f"each item of {what} must be {allowed.wording}, not {item!r}"
    return None


def _decomposition_fields(method: str) -> tuple[str, ...]:
    """The mappable fields a decomposition writes (``"auto"``: either method's)."""
    spectral = SPECTRAL_VARIABLES if method != "regional" else ()
    regional = REGIONAL_VARIABLES if method != "spectral" else ()
    return tuple(dict.fromkeys(spectral + regional))


def load_config(path: str | os.PathLike) -> Config:
    """Read and validate a batch config; inputs are expanded and must exist.

    Raises
    ------
    ConfigError
        Naming the file, the line, the key and what is expected.
    """
    cfg_path = Path(path)
    try:
        text = cfg_path.read_text()
    except OSError as exc:
        raise ConfigError(f"{cfg_path}: cannot read the config ({exc.strerror})") from exc
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{cfg_path}: not valid TOML ({exc})") from exc
    tables: dict[str, dict[str, Any]] = {}
    for table, values in raw.items():
        if table not in SCHEMA:
            raise ConfigError(f"{_where(cfg_path, text, table, None)}: unknown table [{table}]; "
                              f"known tables: {', '.join('[' + t + ']' for t in SCHEMA)}")
        if not isinstance(values, dict):
            raise ConfigError(f"{_where(cfg_path, text, table, None)}: {table} must be a table "
                              f"([{table}]), not a single value")
        schema = SCHEMA[table]
        checked: dict[str, Any] = {}
        if table == "metadata":
            tables[table] = _metadata(values, cfg_path, text)
            continue
        for key, value in values.items():
            if key not in schema:
                raise ConfigError(f"{_where(cfg_path, text, table, key)}: unknown key "
                                  f"[{table}] {key}; known keys: {', '.join(schema)}")
            types, _ = schema[key]
            ok = isinstance(value, types) and not (isinstance(value, bool) and bool not in types)
            if not ok:
                raise ConfigError(f"{_where(cfg_path, text, table, key)}: [{table}] {key} must be "
                                  f"{_type_name(types)}, not {value!r}")
            allowed = VALUES.get(table, {}).get(key)
            refusal = _refusal(f"[{table}] {key}", value, allowed) if allowed else None
            if refusal:
                raise ConfigError(f"{_where(cfg_path, text, table, key)}: {refusal}")
            checked[key] = value
        for key, (_, default) in schema.items():
            if key not in checked:
                if default is REQUIRED:
                    raise ConfigError(f"{_where(cfg_path, text, table, None)}: [{table}] needs "
                                      f"the key {key}")
                checked[key] = default
        tables[table] = checked
    for table in ("input", "output"):
        if table not in tables:
            raise ConfigError(f"{cfg_path}: the config needs an [{table}] table")
    config = Config(path=cfg_path, tables=tables)
    _check_values(config, text)
    return config


def _metadata(values: dict[str, Any], cfg_path: Path, text: str) -> dict[str, str]:
    """The ``[metadata]`` table: attribute names and their text."""
    for key, value in values.items():
        where = _where(cfg_path, text, "metadata", key)
        if not ATTRIBUTE_NAME.match(key):
            raise ConfigError(f"{where}: [metadata] {key}: an attribute name has letters, digits "
                              "and underscores and begins with a letter")
        if not isinstance(value, str):
            raise ConfigError(f"{where}: [metadata] {key} must be a string, not {value!r}")
    return dict(values)


def _check_values(config: Config, text: str) -> None:
    cfg_path = config.path
    base = cfg_path.parent
    inputs: list[Path] = []
    for item in config.tables["input"]["paths"]:
        pattern = str(base / item)
        matches = sorted(glob.glob(pattern)) if glob.has_magic(pattern) else (
            [pattern] if Path(pattern).exists() else [])
        if not matches:
            raise ConfigError(f"{_where(cfg_path, text, 'input', 'paths')}: [input] paths: "
                              f"{item} matches no file (paths are relative to the config file)")
        inputs.extend(Path(m).resolve() for m in matches)
    config.inputs = list(dict.fromkeys(inputs))
    storage = config.tables["output"]
    refusal = encoding_refusal(storage["precision"], storage["compression"],
                               storage["compression_level"], storage["significant_digits"])
    if refusal:
        raise ConfigError(f"{_where(cfg_path, text, 'output', None)}: [output] {refusal}")
    for stage, fields_allowed in TEMPLATE_FIELDS.items():
        if stage in config.tables:
            template = config.tables[stage]["output"]
            check_template(template, fields_allowed, _where(cfg_path, text, stage, "output"),
                           f"[{stage}] output")
            if stage != "maps" and (refusal := output_suffix_refusal(template)):
                raise ConfigError(f"{_where(cfg_path, text, stage, 'output')}: [{stage}] "
                                  f"output: {refusal}")
            if storage["significant_digits"] is not None and \
                    is_zarr_path(template):
                raise ConfigError(f"{_where(cfg_path, text, 'output', 'significant_digits')}: "
                                  f"[output] significant_digits: [{stage}] output {template} "
                                  "is a Zarr store, and quantization is written to NetCDF "
                                  "outputs only; drop significant_digits or write .nc files")
    if "advect" in config.tables:
        adv = config.tables["advect"]
        if (adv["starts"] is None) == (adv["starts_file"] is None):
            raise ConfigError(f"{_where(cfg_path, text, 'advect', None)}: [advect] needs exactly "
                              "one of starts = [[lat, lon, level], ...] or starts_file = \"FILE.csv\"")
        if adv["starts_file"] is not None and not (base / adv["starts_file"]).is_file():
            raise ConfigError(f"{_where(cfg_path, text, 'advect', 'starts_file')}: [advect] "
                              f"starts_file {adv['starts_file']} does not exist")
    if "circulation" in config.tables:
        _check_circulation(config, text)
    if "decompose" in config.tables:
        dec = config.tables["decompose"]
        if dec["method"] == "regional" and dec["truncation"] is not None:
            raise ConfigError(f"{_where(cfg_path, text, 'decompose', 'truncation')}: [decompose] "
                              "truncation applies to the spectral method only, not to method "
                              "\"regional\"; drop it or use method \"spectral\" or \"auto\"")
        written = _decomposition_fields(dec["method"]) + tuple(WIND_PRODUCTS)
        if dec["fields"] is not None:
            refusal = _refusal("[decompose] fields", dec["fields"], _one_of(written, each=True))
            if refusal:
                raise ConfigError(f"{_where(cfg_path, text, 'decompose', 'fields')}: {refusal} "
                                  f"(the fields of [decompose] method \"{dec['method']}\")")
            written = tuple(dec["fields"])
        if "maps" in config.tables:
            refusal = _refusal("[maps] fields", config.tables["maps"]["fields"],
                               _one_of(written, each=True))
            if refusal:
                raise ConfigError(f"{_where(cfg_path, text, 'maps', 'fields')}: {refusal} "
                                  f"(the fields [decompose] writes)")


def _check_circulation(config: Config, text: str) -> None:
    """Contours that the library accepts, files that exist, a radius for the tracks."""
    from .contours import box, circle

    cfg, base = config.tables["circulation"], config.path.parent
    where = lambda key: _where(config.path, text, "circulation", key)  # noqa: E731
    if not any(cfg[key] for key in ("boxes", "circles", "polygons", "tracks")):
        raise ConfigError(f"{where(None)}: [circulation] needs at least one contour: boxes, "
                          "circles, polygons or tracks")
    if cfg["tracks"] and cfg["track_radius_km"] is None:
        raise ConfigError(f"{where('tracks')}: [circulation] tracks need track_radius_km "
                          "(the radius of the moving circles in km)")
    for key, make in (("boxes", box), ("circles", circle)):
        for values in cfg[key]:
            try:
                make(*values)
            except UsageError as exc:
                raise ConfigError(f"{where(key)}: [circulation] {key}: {exc}") from None
    for key in ("polygons", "tracks"):
        for name in cfg[key]:
            if not (base / name).is_file():
                raise ConfigError(f"{where(key)}: [circulation] {key}: {name} does not exist "
                                  "(paths are relative to the config file)")


def check_template(template: str, allowed: set[str], where: str, what: str) -> None:
    """Refuse an output-name template with unknown fields or one that leaves the directory."""
    found = set(re.findall(r"{(\w*)[^}]*}", template))
    unknown = found - allowed
    if unknown:
        raise ConfigError(f"{where}: {what} {template!r} uses unknown field(s) "
                          f"{', '.join(sorted(unknown))}; allowed: {', '.join(sorted(allowed))}")
    if os.path.isabs(template) or ".." in Path(template).parts or template.startswith("~"):
        raise ConfigError(f"{where}: {what} {template!r} would write outside the output "
                          "directory; give a name relative to it without '..'")


def render_template(template: str, directory: Path, **values: Any) -> Path:
    """Fill an output-name template; the result always lies inside ``directory``.

    Field values are made safe for file names first (no path separators), and
    the final path is checked against ``directory`` once more.
    """
    safe = {k: re.sub(r"[^A-Za-z0-9_.+-]", "-", str(v)).lstrip(".") or "-" for k, v in values.items()}
    path = (directory / template.format(**safe)).resolve()
    root = directory.resolve()
    if root not in path.parents:
        raise ConfigError(f"output name {template!r} with {values} would leave {root}")
    return path

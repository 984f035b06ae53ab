"""The batch configuration (TOML): its schema, defaults and error messages.

Every key is documented in ``configs/README.md``. Paths are relative to the
config file. Unknown keys and wrong types are errors that name the key and
the line it is on.
"""

from __future__ import annotations

import glob
import os
import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from .errors import UsageError


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
    },
    "decompose": {
        "method": ((str,), "auto"),
        "scheme": ((str,), "variational"),
        "truncation": ((int,), None),
        "levels": ((list,), None),
        "float32": ((bool,), False),
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
    "maps": {
        "fields": ((list,), ["streamfunction", "velocity_potential"]),
        "levels": ((list,), None),
        "trajectories": ((bool,), True),
        "output": ((str,), "{stem}_{field}_{level}.png"),
    },
    "output": {
        "directory": ((str,), REQUIRED),
    },
    "run": {
        "workers": ((int,), None),
        "scheduler": ((str,), None),
    },
}
STAGES = ("decompose", "advect", "maps")
TEMPLATE_FIELDS = {
    "decompose": {"stem"},
    "advect": {"stem"},
    "maps": {"stem", "field", "level", "time"},
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
        for key, value in values.items():
            if key not in schema:
                raise ConfigError(f"{_where(cfg_path, text, table, key)}: unknown key "
                                  f"[{table}] {key}; known keys: {', '.join(schema)}")
            types, _ = schema[key]
            ok = isinstance(value, types) and not (isinstance(value, bool) and bool not in types)
            if not ok:
                raise ConfigError(f"{_where(cfg_path, text, table, key)}: [{table}] {key} must be "
                                  f"{_type_name(types)}, not {value!r}")
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


def _check_values(config: Config, text: str) -> None:
    cfg_path = config.path
    base = cfg_path.parent
    inputs: list[Path] = []
    for item in config.tables["input"]["paths"]:
        if not isinstance(item, str):
            raise ConfigError(f"{_where(cfg_path, text, 'input', 'paths')}: [input] paths must "
                              f"be a list of strings, not {item!r}")
        pattern = str(base / item)
        matches = sorted(glob.glob(pattern)) if glob.has_magic(pattern) else (
            [pattern] if Path(pattern).exists() else [])
        if not matches:
            raise ConfigError(f"{_where(cfg_path, text, 'input', 'paths')}: [input] paths: "
                              f"{item} matches no file (paths are relative to the config file)")
        inputs.extend(Path(m).resolve() for m in matches)
    config.inputs = list(dict.fromkeys(inputs))
    for stage, fields_allowed in TEMPLATE_FIELDS.items():
        if stage in config.tables:
            check_template(config.tables[stage]["output"], fields_allowed,
                           _where(cfg_path, text, stage, "output"), f"[{stage}] output")
    if "advect" in config.tables:
        adv = config.tables["advect"]
        if (adv["starts"] is None) == (adv["starts_file"] is None):
            raise ConfigError(f"{_where(cfg_path, text, 'advect', None)}: [advect] needs exactly "
                              "one of starts = [[lat, lon, level], ...] or starts_file = \"FILE.csv\"")
        if adv["starts_file"] is not None and not (base / adv["starts_file"]).is_file():
            raise ConfigError(f"{_where(cfg_path, text, 'advect', 'starts_file')}: [advect] "
                              f"starts_file {adv['starts_file']} does not exist")
        for start in adv["starts"] or []:
            if not (isinstance(start, list) and len(start) in (2, 3)
                    and all(isinstance(x, _NUMBER) and not isinstance(x, bool) for x in start)):
                raise ConfigError(f"{_where(cfg_path, text, 'advect', 'starts')}: [advect] each "
                                  f"start must be [lat, lon] or [lat, lon, level], not {start!r}")
    workers = config.tables.get("run", {}).get("workers")
    if workers is not None and workers < 1:
        raise ConfigError(f"{_where(cfg_path, text, 'run', 'workers')}: [run] workers must be "
                          "at least 1")


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

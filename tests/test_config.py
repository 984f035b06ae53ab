"""Batch config errors: each names the key (and line), exit 2, nothing written.

The TOML grammar is TOML v1.0.0 (toml.io), read by the standard library's
:mod:`tomllib` (PEP 680).
"""

from __future__ import annotations

from pathlib import Path

import pytest

from flowpipe.choices import METHODS, SPECTRAL_VARIABLES, VERTICAL, WIND_PRODUCTS
from flowpipe.choices import SCHEMES as REGIONAL_SCHEMES
from flowpipe.cli import main
from flowpipe.config import ConfigError, load_config, render_template

ROOT = Path(__file__).resolve().parents[1]
SAMPLE = ROOT / "sample_data" / "demo_regional.nc"


def _config(tmp_path: Path, body: str) -> Path:
    path = tmp_path / "night.toml"
    path.write_text(f'[input]\npaths = ["{SAMPLE}"]\n\n[output]\ndirectory = "out"\n\n{body}')
    return path


@pytest.mark.parametrize(
    ("body", "expected"),
    [
        ("[decompose]\nmethd = \"auto\"\n", "line 8: unknown key [decompose] methd"),
        ("[decompose]\ntruncation = \"ten\"\n", "line 8: [decompose] truncation must be an integer"),
        ("[advect]\nhours = true\nstarts = [[50.0, 0.0]]\n", "line 8: [advect] hours must be"),
        ("[decompose]\noutput = \"../../elsewhere/{stem}.nc\"\n", "would write outside the output"),
        ("[decompose]\noutput = \"/tmp/{stem}.nc\"\n", "would write outside the output"),
        ("[maps]\noutput = \"{stem}_{colour}.png\"\n", "unknown field(s) colour"),
        ("[extras]\nx = 1\n", "line 7: unknown table [extras]"),
        ("[advect]\nhours = 12\n", "needs exactly one of starts"),
        ("[ftle]\nhours = 6\noutput = \"{stem}_ftle.png\"\n",
         "line 9: [ftle] output: {stem}_ftle.png would be a NetCDF-4 file"),
    ],
)
def test_config_errors_name_the_key_and_line(tmp_path, capsys, body, expected):
    path = _config(tmp_path, body)
    with pytest.raises(ConfigError, match=None) as exc:
        load_config(path)
    assert expected in str(exc.value)
    assert main(["run", str(path)]) == 2
    err = capsys.readouterr().err
    assert err.startswith("flowpipe: error:") and expected in err and "Traceback" not in err
    assert not (tmp_path / "out").exists()  # nothing written


def test_quantization_with_a_zarr_template_is_refused_when_loading(tmp_path, capsys):
    # configs/README.md: significant_digits applies to NetCDF outputs only (Zarr stores
    # take no quantization), said at loading, before anything is written.
    path = tmp_path / "night.toml"
    path.write_text(f'[input]\npaths = ["{SAMPLE}"]\n\n[decompose]\noutput = "{{stem}}.zarr"\n'
                    '\n[output]\ndirectory = "out"\nsignificant_digits = 3\n')
    assert main(["run", str(path)]) == 2
    err = capsys.readouterr().err
    assert "line 9: [output] significant_digits: [decompose] output {stem}.zarr is a Zarr store" \
        in err
    assert not (tmp_path / "out").exists()


def test_missing_input_path_is_named(tmp_path, capsys):
    path = tmp_path / "night.toml"
    path.write_text('[input]\npaths = ["nowhere/*.nc"]\n[output]\ndirectory = "out"\n')
    assert main(["run", str(path)]) == 2
    err = capsys.readouterr().err
    assert "line 2" in err and "nowhere/*.nc matches no file" in err
    assert not (tmp_path / "out").exists()


def test_templates_cannot_escape_through_field_values(tmp_path):
    out = render_template("{stem}_x.nc", tmp_path, stem="../../etc/passwd")
    assert tmp_path.resolve() in out.parents
    assert out.name.endswith("_x.nc")


def test_defaults_are_filled(tmp_path):
    config = load_config(_config(tmp_path, "[decompose]\n"))
    assert config.section("decompose")["method"] == "auto"
    assert config.inputs == [SAMPLE.resolve()]
    assert config.output_dir == (tmp_path / "out").resolve()


def _choices(names) -> str:
    return ", ".join(names)


_HOURS = "[advect]\nstarts = [[52.0, 4.0, 850.0]]\nhours = {}\n"
_ADVECT = "[advect]\nstarts = {}\nhours = 6\n"
_START = "must be [lat, lon] or [lat, lon, level] of finite numbers with lat within -90..90"


# The contract: configs/README.md ("values ... are errors naming the key and its line (exit
# code 2, nothing written)") and DEVELOPERS.md, rules of the house (one-line message naming the
# key and how to fix it). The allowed choices are the library's own constants, imported here
# too, so that the message and the library cannot drift apart.
@pytest.mark.parametrize(
    ("body", "expected"),
    [
        # [decompose] method and scheme: flowpipe.decompose.METHODS, flowpipe.regional.SCHEMES.
        ("[decompose]\nmethod = \"foo\"\n",
         f"line 8: [decompose] method must be one of {_choices(METHODS)}, not 'foo'"),
        ("[decompose]\nscheme = \"foo\"\n",
         f"line 8: [decompose] scheme must be one of {_choices(REGIONAL_SCHEMES)}, not 'foo'"),
        # A triangular truncation N is at least 1: flowpipe.slabs.spectral_plan.
        ("[decompose]\ntruncation = 0\n", "line 8: [decompose] truncation must be at least 1, not 0"),
        # Truncation is spectral only: flowpipe.decompose.decompose refuses it with "regional".
        ("[decompose]\nmethod = \"regional\"\ntruncation = 10\n",
         "line 9: [decompose] truncation applies to the spectral method only"),
        # Levels: configs/README.md ("list of numbers"); an empty list selects nothing.
        ("[decompose]\nlevels = []\n", "line 8: [decompose] levels must hold at least one item"),
        ("[decompose]\nlevels = [850, nan]\n",
         "line 8: each item of [decompose] levels must be a finite number, not nan"),
        ("[maps]\nlevels = [inf]\n", "line 8: each item of [maps] levels must be a finite number, not inf"),
        # hours > 0 and finite: the checks at the top of flowpipe.parcels.advect.
        (_HOURS.format(0), "line 9: [advect] hours must be a finite number above 0, not 0"),
        (_HOURS.format(-3), "line 9: [advect] hours must be a finite number above 0, not -3"),
        (_HOURS.format("nan"), "line 9: [advect] hours must be a finite number above 0, not nan"),
        (_HOURS.format("inf"), "line 9: [advect] hours must be a finite number above 0, not inf"),
        # step_minutes > 0: flowpipe.parcels.advect.
        (_HOURS.format(6) + "step_minutes = 0\n",
         "line 10: [advect] step_minutes must be a finite number above 0, not 0"),
        (_HOURS.format(6) + "step_minutes = -5.0\n",
         "line 10: [advect] step_minutes must be a finite number above 0, not -5.0"),
        # vertical: the keys of flowpipe.choices.VERTICAL.
        (_HOURS.format(6) + "vertical = \"x\"\n",
         f"line 10: [advect] vertical must be one of {_choices(VERTICAL)}, not 'x'"),
        # Starts: a latitude lies within -90..90 and positions are finite (common practice,
        # and what flowpipe.parcels.advect checks); no start at all is refused there too.
        (_ADVECT.format("[[95.0, 4.0]]"), f"line 8: each item of [advect] starts {_START}, "
         "not [95.0, 4.0]"),
        (_ADVECT.format("[[52.0, nan, 850.0]]"), f"line 8: each item of [advect] starts {_START}, "
         "not [52.0, nan, 850.0]"),
        (_ADVECT.format("[]"), "line 8: [advect] starts must hold at least one item"),
        # sample: configs/README.md ("list of strings"), variable names.
        (_HOURS.format(6) + "sample = [1]\n",
         "line 10: each item of [advect] sample must be a variable name (a non-empty string), "
         "not 1"),
        # Map fields: the fields the configured decomposition writes (flowpipe.choices.
        # SPECTRAL_VARIABLES, REGIONAL_VARIABLES).
        ("[decompose]\n[maps]\nfields = [\"colour\"]\n",
         "line 9: each item of [maps] fields must be one of streamfunction"),
        ("[decompose]\nmethod = \"spectral\"\n[maps]\nfields = [\"u_harmonic\"]\n",
         "line 10: each item of [maps] fields must be one of "
         f"{_choices(SPECTRAL_VARIABLES + tuple(WIND_PRODUCTS))}, not 'u_harmonic'"),
        ("[decompose]\nfields = [\"streamfunction\"]\n[maps]\nfields = [\"vorticity\"]\n",
         "line 10: each item of [maps] fields must be one of streamfunction, not 'vorticity'"),
        ("[decompose]\nfields = [\"speed\"]\n", "line 8: each item of [decompose] fields "
         "must be one of streamfunction"),
        # workers: configs/README.md ("cores the run may use").
        ("[run]\nworkers = 0\n", "line 8: [run] workers must be at least 1, not 0"),
    ],
)
def test_values_out_of_range_are_refused_when_loading(tmp_path, body, expected):
    path = _config(tmp_path, body)
    with pytest.raises(ConfigError) as exc:
        load_config(path)
    assert expected in str(exc.value) and str(path) in str(exc.value)
    assert "\n" not in str(exc.value)


# configs/README.md: exit code 2 and nothing written (no output directory, manifest, log or
# report); the reproduction of the bug report ([advect] hours = 0 used to exit 1 after writing).
def test_bad_value_exits_2_before_anything_is_written(tmp_path, capsys):
    path = _config(tmp_path, _HOURS.format(0))
    assert main(["run", str(path)]) == 2
    err = capsys.readouterr().err
    assert "line 9: [advect] hours must be a finite number above 0, not 0" in err
    assert not (tmp_path / "out").exists()


# configs/README.md: [input] paths is required (the files to process); an empty list names none.
def test_empty_input_paths_are_refused(tmp_path):
    path = tmp_path / "night.toml"
    path.write_text('[input]\npaths = []\n[output]\ndirectory = "out"\n')
    with pytest.raises(ConfigError, match=r"line 2: \[input\] paths must hold at least one item"):
        load_config(path)


# Valid configs behave as before: every choice the library offers is accepted (the library's
# constants, see above), and the shipped demo config loads (configs/demo.toml, `make demo`).
@pytest.mark.parametrize(
    "body",
    [f'[decompose]\nmethod = "{m}"\n' for m in METHODS]
    + [f'[decompose]\nscheme = "{s}"\n' for s in REGIONAL_SCHEMES]
    + [_HOURS.format(6) + f'vertical = "{v}"\n' for v in VERTICAL]
    + ['[decompose]\nmethod = "regional"\n[maps]\nfields = ["u_harmonic"]\nlevels = []\n',
       '[decompose]\nmethod = "spectral"\ntruncation = 1\nlevels = [850]\n[run]\nworkers = 1\n',
       _HOURS.format(0.5) + "step_minutes = 10\nsample = []\n"],
)
def test_allowed_values_still_load(tmp_path, body):
    load_config(_config(tmp_path, body))


def test_demo_config_still_loads():
    config = load_config(ROOT / "configs" / "demo.toml")
    assert config.stages == ("decompose", "advect", "maps")

"""Batch config errors: each names the key (and line), exit 2, nothing written.

The TOML grammar is TOML v1.0.0 (toml.io), read by the standard library's
:mod:`tomllib` (PEP 680).
"""

from __future__ import annotations

from pathlib import Path

import pytest

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

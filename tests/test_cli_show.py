"""Tests of the command line (certify/cli.py) and ``certify show``."""

import importlib.util
import json
import subprocess
import sys
from pathlib import Path

import pytest

from certify.cli import COMMANDS, main, module_name

ROOT = Path(__file__).resolve().parent.parent
MODELS = sorted((ROOT / "models").glob("*.toml"))
FERMENTER = ROOT / "models" / "fermenter.toml"

INTERVAL_MODEL = """\
[model]
name = "decay with an uncertain rate"
time_unit = "s"
[states]
x = { range = [1, 4], unit = "m", about = "distance" }
[parameters]
k = { range = [0.25, 0.75], unit = "1/s" }
[equations]
x = "-k*abs(x)"
[constraints]
floor = "x >= 0.5"
"""


@pytest.mark.parametrize("path", MODELS, ids=[path.name for path in MODELS])
def test_show_every_model(path, capsys):
    assert main(["show", str(path)]) == 0
    out = capsys.readouterr().out
    assert out.startswith("model: ")
    for line in ("states (analysis window):", "equations (definitions substituted):", "limits (closed;"):
        assert line in out


def test_show_fermenter_text(capsys):
    assert main(["show", str(FERMENTER)]) == 0
    out = capsys.readouterr().out
    assert "model: Substrate-inhibited continuous fermenter" in out
    assert "time unit: h" in out
    assert "  s in [0, 12] g/L  (substrate in the vessel)" in out
    assert "  mu_max = 0.5" in out
    assert "  mu = mu_max*s/(Ks + s + s^2/Ki)" in out
    assert "  biomass_floor: x >= 1    g = x - 1 >= 0" in out
    assert "note:" not in out


def test_show_interval_parameter_and_kink_note(tmp_path, capsys):
    path = tmp_path / "interval.toml"
    path.write_text(INTERVAL_MODEL)
    assert main(["show", str(path)]) == 0
    out = capsys.readouterr().out
    assert "  k for every value in [0.25, 0.75] 1/s" in out
    assert "  x' = -k*abs(x)" in out
    assert ("note: abs/min/max make the right-hand side non-smooth: a step whose tube may hold "
            "a kink is taken at order 1") in out


def test_show_json(capsys):
    assert main(["show", str(FERMENTER), "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert data["name"] == "Substrate-inhibited continuous fermenter"
    assert [(s["name"], s["lo"], s["hi"], s["unit"]) for s in data["states"]] == [
        ("s", "0", "12", "g/L"),
        ("x", "0", "10", "g/L"),
    ]
    assert {p["name"]: p["lo"] for p in data["parameters"]}["D"] == "0.2"
    assert data["definitions"] == {"mu": "mu_max*s/(Ks + s + s^2/Ki)"}
    assert set(data["equations"]) == {"s", "x"}
    assert data["constraints"][2] == {"name": "discharge_limit", "text": "s <= 9", "g": "9 - s"}
    assert data["warnings"] == [] and data["uses_kinks"] is False and data["settings"] == {}


def _assert_one_line_error(capsys, code, expected):
    captured = capsys.readouterr()
    assert code == 2
    assert captured.out == ""
    assert captured.err.count("\n") == 1
    assert captured.err.startswith("certify: error: ")
    assert expected in captured.err
    assert "Traceback" not in captured.err


def test_missing_file_is_one_line_and_exit_2(tmp_path, capsys):
    missing = tmp_path / "nope.toml"
    _assert_one_line_error(capsys, main(["show", str(missing)]), f"{missing}: no such file")


def test_bad_model_is_one_line_and_exit_2(tmp_path, capsys):
    path = tmp_path / "bad.toml"
    path.write_text(INTERVAL_MODEL.replace('"-k*abs(x)"', '"-k*abs(x) + t"'))
    code = main(["show", str(path)])
    _assert_one_line_error(capsys, code, "bad.toml: [equations] x: column 13: time 't' may not appear")


def test_error_in_a_real_process_has_no_traceback(tmp_path):
    result = subprocess.run(
        [sys.executable, "-m", "certify.cli", "show", str(tmp_path / "nope.toml")],
        capture_output=True,
        text=True,
        check=False,
    )
    assert result.returncode == 2
    assert result.stderr == f"certify: error: {tmp_path / 'nope.toml'}: no such file\n"


def test_help_describes_every_existing_command(capsys):
    assert main(["--help"]) == 0
    out = capsys.readouterr().out
    existing = [name for name in COMMANDS if importlib.util.find_spec(module_name(name))]
    assert "show" in existing
    for name in existing:
        assert f"    {name} " in out
        assert main([name, "--help"]) == 0
        assert capsys.readouterr().out.startswith(f"usage: certify {name}")
    for name in set(COMMANDS) - set(existing):
        assert name in out.split("Not built yet:")[1]


def test_version_and_usage_errors(capsys):
    assert main(["--version"]) == 0
    assert capsys.readouterr().out.startswith("certify ")
    assert main([]) == 2
    assert "a command is required" in capsys.readouterr().err
    assert main(["no-such-command"]) == 2
    assert main(["show"]) == 2

"""A misspelt field or section in every kind of TOML file the commands read (sensor, scene, settings,
stream layout, calibration) is named as unknown, with the field it is closest to, and the error names
the file; run through `python -m cubecast.daemon.cli` as a user meets it. The field names are those of
README's tables for each file."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

from cubecast.daemon.calibfile import load_calibration_file
from cubecast.daemon.sensor import load_sensor

from .helpers import SAMPLES, YARD_SENSOR

REPO = Path(__file__).resolve().parent.parent
YARD = SAMPLES / "yard.cap"
YARD_SCENE = SAMPLES / "yard_scene.toml"
LAYOUT = SAMPLES / "example_layout.toml"


def run_cli(*args) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "cubecast.daemon.cli", *map(str, args)], cwd=REPO, text=True,
                          capture_output=True, timeout=120)


def error_line(done: subprocess.CompletedProcess) -> str:
    assert done.returncode == 2 and "Traceback" not in done.stderr, done.stderr
    lines = done.stderr.strip().splitlines()
    assert len(lines) == 1, done.stderr
    return lines[0]


def edited(tmp_path: Path, source: Path | str, old: str, new: str, name: str = "edited.toml") -> Path:
    text = source.read_text() if isinstance(source, Path) else source
    assert text.count(old) == 1, old
    out = tmp_path / name
    out.write_text(text.replace(old, new))
    return out


# ---- sensor ---------------------------------------------------------------------------------------

@pytest.mark.parametrize("old,new,expected", [
    # a required field misspelt: the reader meets the missing field first and names the misspelling
    ("slope_hz_per_s = 30.0e12", "slope_hz_per_sec = 30.0e12",
     "[chirp] slope_hz_per_s is missing (slope_hz_per_sec is given: did you mean slope_hz_per_s?)"),
    # an optional field misspelt
    ("design_max_range_m = 22.0", "design_max_rang_m = 22.0",
     "[chirp] unknown field design_max_rang_m (did you mean design_max_range_m?)"),
    ("mount_height_m = 1.0", "mount_hieght_m = 1.0",
     "[antennas] unknown field mount_hieght_m (did you mean mount_height_m?)"),
    ("[adc]", "[adcc]", "unknown section [adcc] (did you mean [adc]?)"),
])
def test_sensor(tmp_path, old, new, expected):
    path = edited(tmp_path, YARD_SENSOR, old, new, "sensor.toml")
    assert error_line(run_cli("describe", path)) == f"cubecast describe: error: {path}: {expected}"


# ---- scene ----------------------------------------------------------------------------------------

@pytest.mark.parametrize("old,new,expected", [
    ("rcs_dbsm = 8.0", "rcs_dbsmm = 8.0", "[[target]] #0 unknown field rcs_dbsmm (did you mean rcs_dbsm?)"),
    ('name = "loading yard"', 'nmae = "loading yard"', "[scene] unknown field nmae (did you mean name?)"),
])
def test_scene(tmp_path, old, new, expected):
    path = edited(tmp_path, YARD_SCENE, old, new, "scene.toml")
    line = error_line(run_cli("simulate", path, "--sensor", YARD_SENSOR, "--out", tmp_path / "x.cap"))
    assert line == f"cubecast simulate: error: {path}: {expected}"
    assert not (tmp_path / "x.cap").exists()


# ---- settings -------------------------------------------------------------------------------------

@pytest.mark.parametrize("text,expected", [
    ("[processing]\ncfar_pf = 1e-6\n", "[processing] unknown field cfar_pf (did you mean cfar_pfa?)"),
    ("[procesing]\ncfar_pfa = 1e-6\n", "unknown section [procesing] (did you mean [processing]?)"),
    ("[processing]\ncfar_pfa = 0.7\n", "[processing] cfar_pfa = 0.7: must be between 0 and 0.5"),
    ("[processing]\ncfar_kind = 3\n", "[processing] cfar_kind = 3: must be a string"),
    ("[processing\n", "not valid TOML"),
])
@pytest.mark.parametrize("command", ["process", "serve", "inspect"])
def test_settings_errors_name_their_file(tmp_path, text, expected, command):
    path = tmp_path / "settings.toml"
    path.write_text(text)
    argv = {"process": ["process", YARD, "--out", tmp_path / "p.csv"],
            "serve": ["serve", "--sensor", YARD_SENSOR, "--sub", "tcp://127.0.0.1:5999", "--pub", "tcp://127.0.0.1:*"],
            "inspect": ["inspect", YARD, "--frame", 0, "--range-m", 9.9, "--velocity-mps", -0.8]}[command]
    line = error_line(run_cli(*argv, "--settings", path))
    assert line.startswith(f"cubecast {command}: error: {path}: ") and expected in line


# ---- stream layout --------------------------------------------------------------------------------

@pytest.mark.parametrize("old,new,expected", [
    ('iq_order = "', 'iq_ordr = "', "[samples] iq_order is missing (iq_ordr is given: did you mean iq_order?)"),
    ("description =", "descripton =", "[layout] unknown field descripton (did you mean description?)"),
    ("header_size_bytes = 24", "header_size_byte = 24",
     "[packet] header_size_bytes is missing (header_size_byte is given: did you mean header_size_bytes?)"),
    ("[layout]", "[layuot]", "unknown section [layuot] (did you mean [layout]?)"),
])
def test_stream_layout(tmp_path, old, new, expected):
    path = edited(tmp_path, LAYOUT, old, new, "layout.toml")
    line = error_line(run_cli("adapter", "--file", tmp_path / "none.bin", "--layout", path, "--sensor", YARD_SENSOR,
                              "--pub", "tcp://127.0.0.1:*"))
    assert line.startswith(f"cubecast adapter: error: {path}: ") and expected in line


# ---- calibration ----------------------------------------------------------------------------------

def calibration_text() -> str:
    """A hand-written calibration of the bundled sensor in the layout of README "Calibration file": unit
    gains, no range bias."""
    s = load_sensor(YARD_SENSOR)
    lines = ["[calibration]", 'format = "cubecast-calibration"', "version = 1", f'sensor_id = "{s.sensor_id}"',
             f'sensor_digest = "{s.digest}"', f'array_digest = "{s.array_digest}"', f"n_tx = {s.n_tx}",
             f"n_rx = {s.n_rx}", 'created_utc = "2024-01-01T00:00:00+00:00"', "range_bias_m = 0.0", "",
             "[target]", "range_m = 8.0", ""]
    for v in range(s.n_virtual):
        lines += ["[[channel]]", f"index = {v}", f"tx = {v // s.n_rx}", f"rx = {v % s.n_rx}",
                  "gain_amplitude = 1.0", "gain_phase_deg = 0.0", ""]
    lines += ["[report]", "warnings = []"]
    return "\n".join(lines) + "\n"


def test_the_hand_written_calibration_is_valid(tmp_path):
    path = tmp_path / "c.toml"
    path.write_text(calibration_text())
    f = load_calibration_file(path, load_sensor(YARD_SENSOR))
    assert f.range_bias_m == 0.0 and (f.gain == 1.0).all()


@pytest.mark.parametrize("old,new,expected", [
    ("range_bias_m = 0.0", "range_bias = 0.0", "[calibration] unknown field range_bias (did you mean range_bias_m?)"),
    ("created_utc =", "created_ut =", "[calibration] unknown field created_ut (did you mean created_utc?)"),
    ("index = 3\n", "index = 3\ngain_phase = 1.0\n",
     "[[channel]] #3 unknown field gain_phase (did you mean gain_phase_deg?)"),
    ("[report]", "[reports]", "unknown section [reports] (did you mean [report]?)"),
])
def test_calibration(tmp_path, old, new, expected):
    path = edited(tmp_path, calibration_text(), old, new, "calibration.toml")
    line = error_line(run_cli("process", YARD, "--out", tmp_path / "p.csv", "--calibration", path))
    assert line == f"cubecast process: error: calibration {path}: {expected}"
    assert not (tmp_path / "p.csv").exists()

"""The command line's own behaviour (daemon/cli.py, daemon/cliout.py), run as `python -m cubecast.daemon.cli`:
output paths checked before a command runs, endpoint flags validated before ZeroMQ sees them, a closed
stdout, --version, help on every argument, no negative zero in what a command prints."""

from __future__ import annotations

import argparse
import errno
import importlib.metadata
import json
import math
import os
import re
import subprocess
import sys
import tomllib
from pathlib import Path

import pytest

from cubecast.daemon import cli
from cubecast.daemon.cliout import no_negative_zero

from .helpers import SAMPLES, YARD_SENSOR

REPO = Path(__file__).resolve().parent.parent
YARD = SAMPLES / "yard.cap"
YARD_SCENE = SAMPLES / "yard_scene.toml"
LAYOUT = SAMPLES / "example_layout.toml"


def run_cli(*args, timeout: float = 120, **kw) -> subprocess.CompletedProcess:
    if "stdout" not in kw and "stderr" not in kw:
        kw["capture_output"] = True
    return subprocess.run([sys.executable, "-m", "cubecast.daemon.cli", *map(str, args)], cwd=REPO, text=True,
                          timeout=timeout, **kw)


def one_error_line(done: subprocess.CompletedProcess, *needles: str) -> str:
    """The run failed with exit code 2 and exactly one line on stderr holding every needle."""
    assert done.returncode == 2, (done.returncode, done.stderr)
    assert "Traceback" not in done.stderr, done.stderr
    lines = done.stderr.strip().splitlines()
    assert len(lines) == 1, done.stderr
    for needle in needles:
        assert needle in lines[0], (needle, lines[0])
    return lines[0]


# ---- output paths -------------------------------------------------------------------------------

def output_cases(missing: Path) -> list[tuple[str, list]]:
    """(flag, argv) for every subcommand flag naming a file the command writes, into a missing folder."""
    return [
        ("--out", ["simulate", YARD_SCENE, "--sensor", YARD_SENSOR, "--out", missing / "x.cap"]),
        ("--out", ["process", YARD, "--out", missing / "x.csv"]),
        ("--png", ["inspect", YARD, "--frame", 0, "--range-m", 9.9, "--velocity-mps", -0.8, "--png", missing / "x.png"]),
        ("--out", ["record", "--sub", "tcp://127.0.0.1:5999", "--out", missing / "x.cap"]),
        ("--points-out", ["record", "--sub", "tcp://127.0.0.1:5999", "--points-out", missing / "x.csv"]),
        ("--out", ["calibrate", YARD, "--target-range-m", 9.0, "--out", missing / "c.toml"]),
        ("--save-datagrams", ["adapter", "--listen", "udp://127.0.0.1:0", "--layout", LAYOUT, "--sensor", YARD_SENSOR,
                              "--save-datagrams", missing / "d.bin"]),
        ("--snapshot", ["view", "--snapshot", missing / "x.png", "--capture", YARD]),
    ]


@pytest.mark.parametrize("case", range(len(output_cases(Path("/")))))
def test_an_output_into_a_missing_folder_is_one_line_naming_the_flag(case, tmp_path):
    missing = tmp_path / "no" / "such"
    flag, argv = output_cases(missing)[case]
    path = str(argv[argv.index(flag) + 1])
    line = one_error_line(run_cli(*argv), f"{flag} {path}", f"folder {missing} does not exist")
    assert line.startswith(f"cubecast {argv[0]}: error: ")
    assert not missing.exists()


def test_process_into_a_folder_or_under_a_file_stops_before_processing(tmp_path):
    done = run_cli("process", YARD, "--out", tmp_path)
    one_error_line(done, f"--out {tmp_path}", "it is a folder")
    under_file = tmp_path / "file.csv"
    under_file.write_text("")
    done = run_cli("process", YARD, "--out", under_file / "x.csv")
    one_error_line(done, f"--out {under_file / 'x.csv'}", f"{under_file} is not a folder")
    # keys --dir makes its folder, but not under a file
    done = run_cli("keys", "k", "--dir", under_file / "keys")
    one_error_line(done, f"--dir {under_file / 'keys'}", "is a file, not a folder")


def test_a_write_failing_after_the_check_is_one_line_naming_the_flag(tmp_path, monkeypatch, capsys):
    # a disk that fills up while the command runs: the OSError of the write, named by its flag
    from cubecast.daemon import files
    out = tmp_path / "x.cap"

    def full_disk(*args, **kw):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(out))

    monkeypatch.setattr(files, "simulate_capture", full_disk)
    assert cli.main(["simulate", str(YARD_SCENE), "--sensor", str(YARD_SENSOR), "--out", str(out)]) == 2
    err = capsys.readouterr().err
    assert err == f"cubecast simulate: error: --out {out}: cannot write: {os.strerror(errno.ENOSPC)}\n"


def test_process_names_its_output_when_the_write_fails(tmp_path, monkeypatch):
    from cubecast.daemon import exports, process
    from cubecast.daemon.errors import CubecastError
    out = tmp_path / "p.csv"

    def refused(self, *args):
        raise PermissionError(errno.EACCES, os.strerror(errno.EACCES), str(self.tmp))

    monkeypatch.setattr(exports.CsvWriter, "_frame", refused)
    with pytest.raises(CubecastError, match=re.escape(f"--out {out}: cannot write: {os.strerror(errno.EACCES)}")):
        process.process_capture(YARD, out, progress=False)
    assert list(tmp_path.iterdir()) == []  # neither the output nor its temporary name is left


# ---- endpoints ----------------------------------------------------------------------------------

def endpoint_argv(command: str, flag: str, value: str, tmp_path: Path) -> list:
    """A command line of `command` whose only problem is `flag` = value."""
    base = {
        "simulate": ["simulate", YARD_SCENE, "--sensor", YARD_SENSOR],
        "replay": ["replay", YARD],
        "adapter": ["adapter", "--file", tmp_path / "d.bin", "--layout", LAYOUT, "--sensor", YARD_SENSOR],
        "serve": ["serve", "--sensor", YARD_SENSOR],
        "worker": ["worker", "--connect", "tcp://127.0.0.1:5998", "--results", "tcp://127.0.0.1:5997"],
        "record": ["record", "--out", tmp_path / "r.cap"],
        "view": ["view"],
        "bridge": ["bridge"],
        "tune": ["tune"],
    }[command]
    if flag in base:  # worker: replace the given endpoint
        i = base.index(flag)
        return base[:i] + [flag, value] + base[i + 2:]
    return base + [flag, value]


ENDPOINT_CASES = [(c, f, b) for c, flags in cli.ENDPOINT_FLAGS.items() for f, b in flags.items()]


@pytest.mark.parametrize("command,flag,bind", ENDPOINT_CASES)
def test_a_port_beyond_65535_is_refused_naming_the_flag(command, flag, bind, tmp_path):
    # TCP ports are 16-bit (Postel, RFC 793, 1981): 1..65535. ZeroMQ would take 99999 modulo 65536 and
    # bind 34463 (the report), so the CLI must refuse it before binding or connecting
    value = "tcp://127.0.0.1:99999"
    one_error_line(run_cli(*endpoint_argv(command, flag, value, tmp_path)), f"{flag} {value}", "1..65535")


@pytest.mark.parametrize("command,flag,bind", [c for c in ENDPOINT_CASES if not c[2]])
def test_a_wildcard_is_refused_where_the_command_connects(command, flag, bind, tmp_path):
    # zmq_tcp(7): the * interface and the * port are for zmq_bind only; a connect needs a peer address
    value = "tcp://*:5601"
    one_error_line(run_cli(*endpoint_argv(command, flag, value, tmp_path)), f"{flag} {value}", "only be bound")


def test_every_endpoint_flag_is_validated():
    # every option taking an ENDPOINT is in cli.ENDPOINT_FLAGS, so no new flag escapes the check
    subs = cli.subcommands(cli.build_parser())
    endpoint_flags = {(name, a.option_strings[-1]) for name, sp in subs.items() for a in sp._actions
                      if a.metavar == "ENDPOINT"}
    assert endpoint_flags, "no ENDPOINT flags found: the walk is broken"
    assert endpoint_flags <= {(c, f) for c, f, _ in ENDPOINT_CASES}


def test_a_malformed_endpoint_says_what_form_is_expected(tmp_path):
    one_error_line(run_cli("serve", "--sensor", YARD_SENSOR, "--sub", "127.0.0.1:5601"),
                   "--sub 127.0.0.1:5601", "tcp://HOST:PORT, ipc://PATH or inproc://NAME")
    one_error_line(run_cli("replay", YARD, "--pub", "tcp://127.0.0.256:5601"), "--pub tcp://127.0.0.256:5601",
                   "not an IPv4 address")
    one_error_line(run_cli("record", "--out", tmp_path / "r.cap", "--sub", "tcp://::1:5602"),
                   "--sub tcp://::1:5602", "tcp://[::1]:PORT")


# ---- closed stdout, version, help ----------------------------------------------------------------

def run_with_closed_stdout(*args) -> subprocess.CompletedProcess:
    """Run with stdout a pipe whose reader has gone (as after `| head` exits): every write fails with EPIPE."""
    r, w = os.pipe()
    os.close(r)
    try:
        return run_cli(*args, stdout=w, stderr=subprocess.PIPE)
    finally:
        os.close(w)


@pytest.mark.parametrize("argv", [["describe", "--json", YARD_SENSOR], ["describe", YARD_SENSOR]])
def test_a_closed_stdout_ends_quietly(argv):
    # the Python documentation's recipe (signal module, "Note on SIGPIPE"): exit status 1, no traceback
    done = run_with_closed_stdout(*argv)
    assert done.returncode == 1 and done.stderr == "", done.stderr


def test_version_is_the_installed_package_version():
    done = run_cli("--version")
    assert done.returncode == 0 and done.stderr == ""
    installed = importlib.metadata.version("cubecast")
    declared = tomllib.loads((REPO / "pyproject.toml").read_text())["project"]["version"]
    assert done.stdout.strip() == f"cubecast {installed}" == f"cubecast {declared}"


def test_every_subcommand_and_argument_has_help():
    parser = cli.build_parser()
    missing = []

    def walk(p: argparse.ArgumentParser, where: str) -> None:
        for a in p._actions:
            if isinstance(a, argparse._HelpAction):
                continue
            if isinstance(a, argparse._SubParsersAction):
                purpose = {c.dest: c.help for c in a._choices_actions}
                for name, sp in a.choices.items():
                    if not (purpose.get(name) or "").strip():
                        missing.append(f"{name}: no help line in `cubecast -h`")
                    if not (sp.description or "").strip():
                        missing.append(f"{name}: no description in `cubecast {name} -h`")
                    walk(sp, f"{where} {name}")
                continue
            if not a.help or a.help == argparse.SUPPRESS or not a.help.strip():
                missing.append(f"{where} {'/'.join(a.option_strings) or a.dest}: no help")

    walk(parser, "cubecast")
    assert missing == []
    # every command of the README's table is there, the viewer's included
    assert {"describe", "simulate", "process", "inspect", "serve", "worker", "keys", "replay", "record", "demo",
            "bench", "calibrate", "adapter", "view"} <= set(cli.subcommands(parser))


def test_subcommand_help_starts_with_its_purpose():
    purpose = {c.dest: c.help for c in next(a for a in cli.build_parser()._actions
                                             if isinstance(a, argparse._SubParsersAction))._choices_actions}
    for name in ("process", "calibrate", "adapter"):
        done = run_cli(name, "-h")
        assert done.returncode == 0
        # argparse wraps the description: compare without the line breaks
        assert " ".join(purpose[name].split()) in " ".join(done.stdout.split())


# ---- negative zero ------------------------------------------------------------------------------

@pytest.mark.parametrize("value", [-0.0, -1e-9, -0.0004, -0.004, 0.0, -0.05, -1.5, 2.0, -123.0])
@pytest.mark.parametrize("spec", [".2f", ".3f", "g", ".6g", ".0e", ".3e", "8.3f", "10.2f", "", ".1%"])
def test_negative_zero_as_python_s_z_option_writes_it(value, spec):
    # reference: PEP 682 (Fischer, 2022), the "z" format option, which normalises a negative zero
    # after rounding; no_negative_zero must give the same text from the plain format
    if spec:
        assert no_negative_zero(format(value, spec)) == format(value, "z" + spec)
    else:  # repr, as json.dumps writes a float: only an exact zero is a zero
        assert no_negative_zero(repr(value)) == ("0.0" if value == 0 else repr(value))


def test_negative_zero_is_left_alone_inside_words_and_numbers():
    for text in ("yard-0", "2024-01-05", "1e-05", "-0.05", "-10", "x-0.0", "+-0.000", "run-0.cap", "-0.001"):
        assert no_negative_zero(text) == text
    assert no_negative_zero("[-0,0] [-1,-0]") == "[0,0] [-1,0]"
    assert no_negative_zero('{"a": -0.0, "b": [-0.0]}') == '{"a": 0.0, "b": [0.0]}'


def test_describe_prints_no_negative_zero(tmp_path):
    # a sensor whose description holds IEEE 754 negative zeros (a TOML float may be -0.0)
    text = YARD_SENSOR.read_text()
    text = text.replace("tx_positions_half_wavelength = [[0, 0],", "tx_positions_half_wavelength = [[-0.0, -0.0],")
    text = text.replace("rx_positions_half_wavelength = [[0, 0],", "rx_positions_half_wavelength = [[-0.0, -0.0],")
    text = text.replace("mount_height_m = 1.0", "mount_height_m = -0.0")
    assert text.count("-0.0") == 5
    sensor = tmp_path / "s.toml"
    sensor.write_text(text)
    plain, as_json = run_cli("describe", sensor), run_cli("describe", "--json", sensor)
    assert plain.returncode == 0 and as_json.returncode == 0, plain.stderr + as_json.stderr
    assert "[0,0] [1,0]" in plain.stdout and not re.search(r"(?<![\w.])-0(?![\w.])", plain.stdout)
    d = json.loads(as_json.stdout)
    assert d["mount_height_m"] == 0.0 and math.copysign(1.0, d["mount_height_m"]) == 1.0
    first = d["virtual_array"]["positions_m"][0]
    assert [math.copysign(1.0, v) for v in first] == [1.0, 1.0, 1.0]


def test_calibrate_report_prints_no_negative_zero(tmp_path):
    # channel 0 is the phase reference, so its phase is zero and may come out as -0.000; a reflector
    # given at azimuth -0 is printed "-0.00" by Python
    scene = tmp_path / "reflector.toml"
    scene.write_text('[scene]\nname = "reflector"\n\n[[target]]\nname = "corner"\nposition_m = [0.0, 8.0, 0.0]\n'
                     'velocity_mps = [0.0, 0.0, 0.0]\nrcs_dbsm = 20.0\n')
    cap = tmp_path / "reflector.cap"
    assert run_cli("-q", "simulate", scene, "--sensor", YARD_SENSOR, "--out", cap, "--frames", 16,
                   "--seed", 3).returncode == 0
    done = run_cli("calibrate", cap, "--target-range-m", 8, "--azimuth-deg", "-0", "--out", tmp_path / "c.toml")
    assert done.returncode == 0, done.stderr
    assert "given 8.000 m, azimuth 0.00 deg" in done.stderr
    assert not re.search(r"(?<![\w.+-])-0(\.0+)?(?![\w.])", done.stderr), done.stderr
    rows = [ln for ln in done.stderr.splitlines() if re.match(r"\s+\d+\s+\d\s+\d\s", ln)]
    assert len(rows) == 12 and len({len(r) for r in rows}) == 1  # the table's columns keep their width

"""README's C capture writer ("Capture file format", "Writing a file") builds with the command the
README gives and writes a capture cubecast reads.

The file it writes is checked three ways: parsed here byte by byte against the README's layout
tables (struct, with zlib.crc32 as the reference CRC-32); its payloads compared with the same
synthetic echo computed by numpy from the definition in the program's comment; and read by
`cubecast info` and `cubecast process` through the command line, the echo coming out where the
textbook FMCW relations put it. A missing C compiler fails the test (CI has gcc)."""

from __future__ import annotations

import csv
import datetime as dt
import json
import os
import re
import shlex
import shutil
import struct
import subprocess
import sys
import zlib
from pathlib import Path

import numpy as np
import pytest

REPO = Path(__file__).resolve().parent.parent
README = (REPO / "README.md").read_text(encoding="utf-8")
SPEED_OF_LIGHT_MPS = 299_792_458.0  # exact, by the SI definition of the metre

# The sensor file the program embeds. Its text has what a writer must escape in JSON: quotes and
# backslashes (in the TOML strings), tabs, one CRLF line end (a control character besides the
# newline) and non-ASCII characters (left as UTF-8).
SENSOR_TOML = (
    '# sensor for the C writer test: "quoted", a back\\slash,\ta tab, 77 GHz ± 1 GHz, Ω\r\n'
    """[sensor]
id = "c-writer"
description = "bench \\"rig\\" at C:\\\\caps\\t(tab escape)"

[chirp]
start_frequency_hz = 77.0e9
slope_hz_per_s = 30.0e12
sample_rate_hz = 5.0e6
samples_per_chirp = 64
adc_start_delay_s = 5.0e-6
ramp_end_time_s = 20.0e-6
chirp_period_s = 25.0e-6

[frame]
chirps_per_frame = 64\t# 32 loops of 2 TX slots
frame_period_s = 0.05

[antennas]
tx_positions_half_wavelength = [[0, 0], [4, 0]]
rx_positions_half_wavelength = [[0, 0], [1, 0], [2, 0], [3, 0]]

[mimo]
scheme = "tdm"

[link]
tx_power_dbm = 12.0
tx_gain_dbi = 10.0
rx_gain_dbi = 10.0
noise_figure_db = 12.0
noise_rms_counts = 4.6

[adc]
sampling = "complex"
sample_type = "int16"
full_scale = 8191
""")
CHIRPS, RX, SAMPLES, FRAMES, PERIOD_S = 64, 4, 64, 5, 0.05
F_START_HZ, SLOPE_HZ_PER_S, FS_HZ, ADC_START_S, CHIRP_PERIOD_S, N_SLOTS = 77.0e9, 30.0e12, 5.0e6, 5.0e-6, 25.0e-6, 2

RECORD = struct.Struct("<4sQdBBH4IQII")  # the README's record header table, field by field


def c_writer_block() -> str:
    blocks = [b for b in re.findall(r"```c\n(.*?)```", README, flags=re.S) if "int main(" in b]
    assert len(blocks) == 1, f"README should hold exactly one C block with a main(), found {len(blocks)}"
    return blocks[0]


def c_compiler() -> list[str]:
    """$CC, else cc, gcc or clang on PATH; none is a failure (the README's claim cannot be checked)."""
    if os.environ.get("CC"):
        cmd = shlex.split(os.environ["CC"])
        if shutil.which(cmd[0]) is None:
            pytest.fail(f"$CC = {os.environ['CC']!r}: no such program; README's C writer cannot be compiled")
        return cmd
    for name in ("cc", "gcc", "clang"):
        path = shutil.which(name)
        if path:
            return [path]
    pytest.fail("no C compiler found ($CC unset; none of cc, gcc, clang on PATH): README's C writer cannot be "
                "compiled; install one (apt-get install gcc)")


def compile_writer(tmp_path: Path, extra_flags: tuple[str, ...] = ()) -> Path:
    (tmp_path / "writer.c").write_text(c_writer_block(), encoding="utf-8")
    cmd = c_compiler() + list(extra_flags) + ["writer.c", "-o", "writer"]  # README: cc writer.c -o writer
    out = subprocess.run(cmd, cwd=tmp_path, capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, f"{' '.join(cmd)} failed:\n{out.stderr}"
    return tmp_path / "writer"


def expected_payload(frame: int) -> np.ndarray:
    """The echo of the program's comment, computed with numpy: sample n of chirp m has the phase
    (2 n + m) / 16 cycle on every RX, amplitude 400 counts, I and Q each rounded; plus the noise
    -8 + (hash(index) >> 28) of each value's index in the file (frame * values + its C-order index)."""
    m, _, n = np.indices((CHIRPS, RX, SAMPLES))
    echo = 400.0 * np.exp(2j * np.pi * (2 * n + m) / 16.0)
    iq = np.stack([np.rint(echo.real), np.rint(echo.imag)], axis=-1).astype(np.int64)
    values = iq.size
    h = ((frame * values + np.arange(values, dtype=np.uint64)) & 0xFFFFFFFF).astype(np.uint32)
    h ^= h >> np.uint32(16)
    h *= np.uint32(0x7FEB352D)
    h ^= h >> np.uint32(15)
    h *= np.uint32(0x846CA68B)
    h ^= h >> np.uint32(16)
    noise = (h >> np.uint32(28)).astype(np.int64) - 8
    return (iq + noise.reshape(iq.shape)).astype("<i2")


def run_cli(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "cubecast.daemon.cli", *args], capture_output=True, text=True,
                          timeout=600)


@pytest.fixture(scope="module")
def capture(tmp_path_factory) -> Path:
    tmp = tmp_path_factory.mktemp("c_writer")
    writer = compile_writer(tmp)
    sensor = tmp / "sensor.toml"
    sensor.write_bytes(SENSOR_TOML.encode("utf-8"))
    out = subprocess.run([str(writer), str(sensor), "out.cap", str(CHIRPS), str(RX), str(SAMPLES), str(FRAMES),
                          str(PERIOD_S)], cwd=tmp, capture_output=True, text=True, timeout=60)
    assert out.returncode == 0, out.stderr
    return tmp / "out.cap"


def test_the_block_is_strict_c99(tmp_path):
    # the README calls it C99 with nothing but the standard library
    compile_writer(tmp_path, ("-std=c99", "-Wall", "-Wextra", "-pedantic", "-Werror"))


def test_the_file_matches_the_readme_layout_byte_by_byte(capture):
    data = capture.read_bytes()
    magic, version, json_len = struct.unpack_from("<8sHI", data, 0)
    assert (magic, version) == (b"CUBECAST", 1)
    json_bytes = data[14:14 + json_len]
    assert struct.unpack_from("<I", data, 14 + json_len)[0] == zlib.crc32(json_bytes)
    header = json.loads(json_bytes.decode("utf-8"))  # the standard library's JSON parser as the reference
    assert header["sensor_toml"] == SENSOR_TOML  # every escape undone exactly
    created = dt.datetime.fromisoformat(header["created_utc"])
    assert created.utcoffset() == dt.timedelta(0)
    assert header["ground_truth"] is None and isinstance(header["metadata"], dict)

    offset = 18 + json_len
    nbytes = CHIRPS * RX * SAMPLES * 2 * 2  # int16 I/Q: 4 bytes a complex sample
    for frame in range(FRAMES):
        marker, seq, ts, code, ndim, reserved, *rest = RECORD.unpack_from(data, offset)
        shape, payload_nbytes, payload_crc, header_crc = tuple(rest[:4]), rest[4], rest[5], rest[6]
        assert (marker, seq, code, ndim, reserved) == (b"CCFR", frame, 2, 4, 0)
        assert ts == frame * PERIOD_S
        assert shape == (CHIRPS, RX, SAMPLES, 2) and payload_nbytes == nbytes
        assert header_crc == zlib.crc32(data[offset:offset + 52])
        payload = data[offset + 56:offset + 56 + nbytes]
        assert payload_crc == zlib.crc32(payload)
        assert payload == expected_payload(frame).tobytes(), f"frame {frame}: payload differs from numpy's"
        offset += 56 + nbytes
    assert offset == len(data)


def test_cubecast_info_reads_it_without_problems(capture):
    out = run_cli("info", str(capture), "--json")
    assert out.returncode == 0, out.stderr
    info = json.loads(out.stdout)
    assert info["sensor_error"] is None and info["sensor"]["sensor_id"] == "c-writer"
    assert info["frames"] == info["frames_usable"] == FRAMES
    assert (info["first_sequence"], info["last_sequence"]) == (0, FRAMES - 1)
    assert info["problems"] == [] and set(info["reader_counts"].values()) == {0}
    assert info["payload_layouts"] == [{"dtype": "int16", "shape": [CHIRPS, RX, SAMPLES, 2], "kind": "adc",
                                        "frames": FRAMES}]
    assert info["gaps"]["frames_missing"] == 0
    assert info["timing"]["frame_rate_hz"] == pytest.approx(1.0 / PERIOD_S)
    assert info["metadata"] == {"source": "C writer, synthetic echo"}


def test_cubecast_process_finds_the_echo_in_every_frame(capture, tmp_path):
    points = tmp_path / "points.csv"
    out = run_cli("process", str(capture), "--out", str(points))
    assert out.returncode == 0, out.stderr
    # the reader's problems are logged as warnings; the front end's summary says how many frames warned
    warned = [line for line in out.stderr.lower().splitlines()
              if "warning" in line and line != f"front end: 0 of {FRAMES} frames with warnings"]
    assert warned == [], out.stderr
    done = re.search(r"(\d+) frames, (\d+) points", out.stderr)
    assert done and int(done.group(1)) == FRAMES, out.stderr
    with points.open(newline="") as f:
        rows = list(csv.DictReader(f))
    assert int(done.group(2)) == len(rows)
    assert {int(r["frame"]) for r in rows} == set(range(FRAMES))

    # Textbook FMCW relations (Richards, Fundamentals of Radar Signal Processing, 2005; common
    # practice): a beat frequency f_b comes from range c f_b / (2 S); a phase step dphi per chirp
    # period T_c is a radial velocity lambda dphi / (4 pi T_c), lambda at the centre of the sampled
    # sweep. The echo: f_b = fs / 8, dphi = 2 pi / 16, positive (receding).
    range_m = SPEED_OF_LIGHT_MPS * (FS_HZ / 8.0) / (2.0 * SLOPE_HZ_PER_S)
    centre_hz = F_START_HZ + SLOPE_HZ_PER_S * (ADC_START_S + 0.5 * SAMPLES / FS_HZ)
    wavelength_m = SPEED_OF_LIGHT_MPS / centre_hz
    velocity_mps = wavelength_m * (2.0 * np.pi / 16.0) / (4.0 * np.pi * CHIRP_PERIOD_S)
    range_bin_m = SPEED_OF_LIGHT_MPS / (2.0 * SLOPE_HZ_PER_S * SAMPLES / FS_HZ)  # c / (2 B)
    velocity_bin_mps = wavelength_m / (2.0 * (CHIRPS // N_SLOTS) * N_SLOTS * CHIRP_PERIOD_S)
    for frame in range(FRAMES):
        strongest = max((r for r in rows if int(r["frame"]) == frame), key=lambda r: float(r["snr_db"]))
        assert float(strongest["timestamp_s"]) == pytest.approx(frame * PERIOD_S, abs=1e-6)
        assert abs(float(strongest["range_m"]) - range_m) < 0.1 * range_bin_m, strongest
        assert abs(float(strongest["velocity_mps"]) - velocity_mps) < 0.1 * velocity_bin_mps, strongest
        assert abs(float(strongest["azimuth_deg"])) < 1.0, strongest  # the same phase on every channel
        assert float(strongest["snr_db"]) > 40.0, strongest

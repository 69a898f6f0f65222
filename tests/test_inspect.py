"""`cubecast inspect`: one range-Doppler cell of one frame, checked against numpy computations written
here from the signal model (README "Conventions and signal model") and textbook relations, on a
scene of our own: a crate carried toward the sensor and a van approaching at 11 m/s, faster than the
map's span (its velocity is unfolded).

The figure (--png) is rendered offscreen; without an EGL or OSMesa GL context those tests fail.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

from cubecast.daemon.chain.pipeline import Pipeline
from cubecast.daemon.cli import main
from cubecast.daemon.errors import CubecastError
from cubecast.daemon.inspect import inspect_cell
from cubecast.daemon.scene import parse_scene
from cubecast.daemon.sensor import SPEED_OF_LIGHT_MPS, load_sensor
from cubecast.daemon.simulate import Simulator
from tests.helpers import YARD_SENSOR

SENSOR = load_sensor(YARD_SENSOR)
# bins of the yard sensor (README "Sensor description": range bin c fs / (2 S N), velocity bin
# lambda / (2 N_loops T_loop) at the centre wavelength)
RANGE_BIN_M = SPEED_OF_LIGHT_MPS * SENSOR.sample_rate_hz / (2.0 * SENSOR.slope_hz_per_s * SENSOR.samples_per_chirp)
VELOCITY_BIN_MPS = SENSOR.wavelength_m / (2.0 * SENSOR.n_loops * SENSOR.n_slots * SENSOR.chirp_period_s)
EPOCH_S = 0.5 * (SENSOR.chirps_per_frame - 1) * SENSOR.chirp_period_s   # frame 0's measurement epoch

# targets on bin centres at the measurement epoch (no straddle loss), SNR per sample and channel given
CRATE = dict(range_m=50 * RANGE_BIN_M, azimuth_deg=20.0, elevation_deg=0.0, velocity_mps=-3 * VELOCITY_BIN_MPS,
             snr_db=0.0)
VAN = dict(range_m=69 * RANGE_BIN_M, azimuth_deg=-15.0, elevation_deg=6.0, velocity_mps=-22 * VELOCITY_BIN_MPS,
           snr_db=-3.0)


def _scene_text() -> str:
    out = '[scene]\nname = "crate and van"\n'
    for name, t in (("crate", CRATE), ("van", VAN)):
        out += (f'\n[[target]]\nname = "{name}"\nrange_m = {t["range_m"] - t["velocity_mps"] * EPOCH_S!r}\n'
                f'azimuth_deg = {t["azimuth_deg"]!r}\nelevation_deg = {t["elevation_deg"]!r}\n'
                f'radial_velocity_mps = {t["velocity_mps"]!r}\nsnr_db = {t["snr_db"]!r}\n')
    return out


SCENE = parse_scene(_scene_text(), "test scene")


@pytest.fixture(scope="module")
def frame():
    return Simulator(SENSOR, SCENE, seed=7).frame(0)


@pytest.fixture(scope="module")
def pipe():
    return Pipeline(SENSOR)


@pytest.fixture(scope="module")
def crate(pipe, frame):
    return inspect_cell(pipe, frame, CRATE["range_m"], CRATE["velocity_mps"])


@pytest.fixture(scope="module")
def van(pipe, frame):
    return inspect_cell(pipe, frame, VAN["range_m"], VAN["velocity_mps"])


def _hann(n: int) -> np.ndarray:
    # Hann window (Harris, Proc. IEEE, 1978), the N-sample middle of the (N + 2)-sample symmetric one, as
    # the chain's window module documents it
    return np.hanning(n + 2)[1:-1]


@pytest.fixture(scope="module")
def numpy_map(frame):
    """The detection map from the frame with numpy alone: chirp m = loop p * n_slots + slot s, Hann over
    samples and loops, FFT over samples then loops, |X|^2 summed over RX and slots, Doppler shifted so
    that column j is bin j - n / 2 (README "How the chain works", steps 1 and 2). [range, doppler] and
    the complex spectrum [doppler (shifted), slot, rx, range]."""
    s = SENSOR
    x = frame.astype(np.complex128).reshape(s.n_loops, s.n_slots, s.n_rx, s.samples_per_chirp)
    x = x * _hann(s.samples_per_chirp) * _hann(s.n_loops)[:, None, None, None]
    spec = np.fft.fftshift(np.fft.fft(np.fft.fft(x, axis=3), axis=0), axes=0)
    return (np.abs(spec) ** 2).sum(axis=(1, 2)).T, spec


def _window_gain() -> float:
    """Per-channel SNR gain of the two windowed FFTs for a tone on a bin centre: (sum w)^2 / sum w^2 per
    axis (coherent over incoherent gain, Harris 1978)."""
    g = 1.0
    for n in (SENSOR.samples_per_chirp, SENSOR.n_loops):
        w = _hann(n)
        g *= w.sum() ** 2 / (w ** 2).sum()
    return g


def test_the_cell_is_the_nearest_to_the_asked_range_and_velocity(crate, van):
    c = crate["cell"]
    assert c["range_bin"] == 50 and c["doppler_bin"] == -3 and c["unfolding_hypothesis"] == 0
    assert math.isclose(c["range_m"], 50 * RANGE_BIN_M, rel_tol=1e-9)
    # the van at -22 bins is beyond the map's +-16: it folds to +10 bins, one span (32 bins) up
    v = van["cell"]
    assert v["range_bin"] == 69 and v["doppler_bin"] == 10 and v["unfolding_hypothesis"] == -1
    assert math.isclose(v["velocity_unfolded_mps"], -22 * VELOCITY_BIN_MPS, rel_tol=1e-9)
    assert math.isclose(v["velocity_mps"], 10 * VELOCITY_BIN_MPS, rel_tol=1e-9)


def test_profiles_are_the_maps_column_and_row(crate, van, numpy_map):
    power, _ = numpy_map
    median = np.median(power)
    for res, t in ((crate, CRATE), (van, VAN)):
        r, col = res["cell"]["range_bin"], res["cell"]["doppler_column"]
        prof, dop = res["range_profile"], res["doppler_spectrum"]
        assert np.allclose(prof["power_db"], 10 * np.log10(power[:, col] / median), atol=0.02)
        assert np.allclose(dop["power_db"], 10 * np.log10(power[r, :] / median), atol=0.02)
        # the profile's peak is at the target's range, the spectrum's at its folded velocity, within a cell
        assert abs(prof["range_m"][int(np.argmax(prof["power_db"]))] - t["range_m"]) <= RANGE_BIN_M
        span = SENSOR.n_loops * VELOCITY_BIN_MPS
        folded = (t["velocity_mps"] + span / 2) % span - span / 2
        assert abs(dop["velocity_mps"][int(np.argmax(dop["power_db"]))] - folded) <= VELOCITY_BIN_MPS
        # the threshold lies above the noise and below the target's peak
        assert res["cell"]["detected"] and res["cell"]["above_threshold"]


def test_cfar_noise_statistic_is_the_ordered_statistic_of_the_training_cells(crate, numpy_map):
    # OS-CFAR (Rohling, "Radar CFAR thresholding in clutter and multiple target situations", IEEE Trans.
    # AES, 1983): the k-th smallest of the N training cells, k = round(3/4 N), the window of the
    # [processing] defaults (train 8 / guard 3 in range, train 4 / guard 2 in Doppler, circular in Doppler)
    power, _ = numpy_map
    r, col = crate["cell"]["range_bin"], crate["cell"]["doppler_column"]
    n_dop = power.shape[1]
    cells = []
    for dr in range(-11, 12):
        for dc in range(-6, 7):
            if abs(dr) <= 3 and abs(dc) <= 2:
                continue
            cells.append(power[r + dr, (col + dc) % n_dop])
    cells = np.sort(cells)
    assert len(cells) == 264
    assert math.isclose(crate["cell"]["noise_statistic"], cells[round(0.75 * 264) - 1], rel_tol=1e-4)
    # the threshold is the design factor times the statistic, in the map's dB
    c = crate["cell"]
    assert math.isclose(c["threshold_db"], 10 * math.log10(c["threshold_factor"] * c["noise_statistic"]
                                                              / c["map_median"]), abs_tol=1e-6)


def _channel_values(spec, res, velocity_mps):
    """The cell's virtual channels with numpy: slot s of loop p is chirp p n_slots + s, so a target of
    Doppler f_D has phase 2 pi f_D s T_c more in slot s (common practice for TDM); rotate it back and put
    slot s's values at TX tx_order[s] (the yard sensor: slot s is TX s), channel k n_rx + l."""
    c = res["cell"]
    f_d = 2.0 * velocity_mps / SENSOR.wavelength_m
    vals = spec[c["doppler_column"], :, :, c["range_bin"]]            # [slot, rx]
    s = np.arange(SENSOR.n_slots)[:, None]
    return (vals * np.exp(-2j * np.pi * f_d * s * SENSOR.chirp_period_s)).reshape(-1)


@pytest.mark.parametrize("name", ["crate", "van"])
def test_channel_phases_follow_the_plane_wave_phase_difference(name, crate, van, numpy_map):
    res, t = (crate, CRATE) if name == "crate" else (van, VAN)
    ch = res["channels"]
    # far-field phase across an array: element at x (along the array) lags by 2 pi x sin(az) / lambda
    # (Van Trees, Optimum Array Processing, 2002, ch. 2); in two dimensions 2 pi (x u + z w) / lambda with
    # the direction cosines u = sin(az) cos(el), w = sin(el), each virtual element at tx + rx (the
    # two-way phase centre, common practice); the phase falls toward +x (README signal model)
    az, el = math.radians(t["azimuth_deg"]), math.radians(t["elevation_deg"])
    u, w = math.sin(az) * math.cos(el), math.sin(el)
    virt = (SENSOR.tx_positions_m[:, None, :] + SENSOR.rx_positions_m[None, :, :]).reshape(-1, 3)
    model = -2 * np.pi * (virt[:, 0] * u + virt[:, 2] * w) / SENSOR.wavelength_m
    phase = np.radians(ch["phase_deg"])
    misfit = np.angle(np.exp(1j * (phase - model)))
    resid = np.angle(np.exp(1j * (misfit - np.angle(np.mean(np.exp(1j * misfit))))))
    # phase noise of one complex value at SNR s: 1 / sqrt(2 s) rad (Rife and Boorstyn, IEEE Trans. IT, 1974)
    snr = 10 ** (t["snr_db"] / 10) * _window_gain()
    sigma = 1.0 / math.sqrt(2.0 * snr)
    assert np.max(np.abs(resid)) < 4.5 * sigma, (np.degrees(resid), math.degrees(sigma))
    # the same phases from numpy's own spectrum, Doppler rotation and decoding, at the true velocity (the
    # inspection uses the chain's refined one): equal within the noise
    _, spec = numpy_map
    mine = _channel_values(spec, res, t["velocity_mps"])
    assert np.max(np.abs(np.angle(np.exp(1j * (phase - np.angle(mine)))))) < 4.5 * sigma
    # amplitudes over the noise: the windowed FFTs' gain on the per-sample SNR. The noise is the CFAR's
    # ordered statistic of 264 cells (a sample quantile: relative sigma sqrt(p (1 - p) / N) / (f(x_p) x_p),
    # 2.5 % for Gamma(12) cells at p = 3/4, 0.11 dB) and the mean of 12 channels of |a + n|^2 (0.06 dB at
    # 30 dB SNR): 0.6 dB is 5 sigma
    amp = 10 ** (np.array(ch["amplitude_db"]) / 10)
    assert abs(10 * math.log10(amp.mean() / snr)) < 0.6


@pytest.mark.parametrize("name", ["crate", "van"])
def test_angle_spectra_peak_at_the_simulated_direction(name, crate, van):
    res, t = (crate, CRATE) if name == "crate" else (van, VAN)
    a = res["angle"]
    # the angle FFT's bin in direction cosine: lambda / (pitch N_fft) with pitch lambda / 2 and the
    # automatic sizes of README "Processing settings" (64 in azimuth, 16 in elevation)
    bin_u, bin_w = 2.0 / 64, 2.0 / 16
    az, el = t["azimuth_deg"], t["elevation_deg"]
    peak_az = a["azimuth"]["azimuth_deg"][int(np.argmax(a["azimuth"]["power_db"]))]
    peak_el = a["elevation"]["elevation_deg"][int(np.argmax(a["elevation"]["power_db"]))]
    assert abs(peak_az - az) <= math.degrees(bin_u / (math.cos(math.radians(az)) * math.cos(math.radians(el))))
    assert abs(peak_el - el) <= math.degrees(bin_w / math.cos(math.radians(el)))
    # the estimate is the chain's point in the cell, with its Cramér-Rao sigma: within 5 sigma plus a
    # quarter of the beam's FFT bin (the phase centre is a few millimetres off the origin)
    est = a["estimate"]
    assert est["source"] == "point" and res["points"]
    assert est["sigma_azimuth_deg"] > 0
    assert abs(est["azimuth_deg"] - az) < 5 * est["sigma_azimuth_deg"] + 0.05
    # the spectrum's peak in dB over the channel noise is the plane wave's |a|^2 over the noise, the mean
    # of the channels' amplitudes, less the FFT's scalloping: an 8-element half-wavelength row half a bin
    # (1/64 in u) off its peak keeps sin(N x) / (N sin x) = 0.994 of the amplitude, x = pi / 128 (the
    # uniform array factor, Van Trees 2002): 0.05 dB, plus the noise's 0.1 dB
    amp = 10 ** (np.array(res["channels"]["amplitude_db"]) / 10)
    assert abs(max(a["azimuth"]["power_db"]) - 10 * math.log10(amp.mean())) < 0.5


def test_points_of_the_cell_carry_the_targets_numbers(crate, van):
    for res, t in ((crate, CRATE), (van, VAN)):
        p = max(res["points"], key=lambda q: q["snr_db"])
        # range within a tenth of a cell plus 5 sigma (the chain's accuracy is tested in test_pipeline)
        assert abs(p["range_m"] - t["range_m"]) < 5 * p["sigma_range_m"] + 0.1 * RANGE_BIN_M
        assert abs(p["velocity_mps"] - t["velocity_mps"]) < 5 * p["sigma_velocity_mps"] + 0.02 * VELOCITY_BIN_MPS
        assert res["snapshot"]["doppler_phase_from"] == "the chain's point in the cell"


def test_an_empty_cell_is_not_detected(pipe, frame):
    res = inspect_cell(pipe, frame, 15.0, 4.0)
    c = res["cell"]
    assert not c["detected"] and res["points"] == [] and res["angle"]["estimate"]["source"] in (
        "cell snapshot", "none")
    assert res["snapshot"]["doppler_phase_from"].startswith("the cell centre")
    # noise only: the per-channel SNR the CFAR estimates stays low (exponential power; 13 dB is a
    # chance of exp(-20) for a single channel, far less for the sum of 12)
    assert c["snr_db"] < 13.0
    json.dumps(res, allow_nan=False)


def test_a_frame_of_zeros_gives_valid_json(pipe):
    # nothing to measure: no detection, no direction, and JSON (RFC 8259) has no inf or nan, so the SNR
    # of a cell without noise is null rather than a number json.dumps would refuse
    res = inspect_cell(pipe, np.zeros(pipe.frame_shape, np.complex64), 10.0, 0.0)
    assert not res["cell"]["detected"] and res["cell"]["snr_db"] is None and res["points"] == []
    assert res["angle"]["estimate"]["source"] == "none"
    json.loads(json.dumps(res, allow_nan=False))


@pytest.mark.parametrize("r, v, word", [(30.0, 0.0, "--range-m 30"), (-1.0, 0.0, "--range-m -1"),
                                         (10.0, 30.0, "--velocity-mps 30"), (10.0, float("nan"), "--velocity-mps nan")])
def test_outside_the_coverage_is_an_error_naming_the_value(pipe, frame, r, v, word):
    # coverage: range 0 .. c fs / (2 S) (complex sampling) and velocity +-lambda / (4 T_c) unfolded over
    # the TDM slots (README "Sensor description")
    with pytest.raises(CubecastError, match=word.replace("-", r"\-")):
        inspect_cell(pipe, frame, r, v)


@pytest.fixture(scope="module")
def capture(tmp_path_factory):
    from cubecast.daemon.files import simulate_capture
    path = tmp_path_factory.mktemp("inspect") / "crate_van.cap"
    simulate_capture(SENSOR, SCENE, path, frames=2, seed=7)
    return path


def test_cli_json_and_errors(capture, capsys):
    # frame 1, 0.1 s later: the van is 1.1 m nearer, 5.67 range bins (nearest cell 63)
    r1 = VAN["range_m"] + VAN["velocity_mps"] * SENSOR.frame_period_s
    args = ["inspect", str(capture), "--frame", "1", "--range-m", str(r1), "--velocity-mps", str(VAN["velocity_mps"])]
    assert main(args + ["--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["frame"] == 1 and out["sequence"] == 1 and out["cell"]["range_bin"] == round(r1 / RANGE_BIN_M) == 63
    assert out["cell"]["detected"] and out["points"]
    for key in ("range_profile", "doppler_spectrum", "channels", "angle"):
        assert key in out
    assert main(args) == 0
    text = capsys.readouterr().out
    assert "; detected" in text and "range bin 63" in text
    assert main(["inspect", str(capture), "--frame", "2", "--range-m", "5", "--velocity-mps", "0"]) == 2
    assert "--frame 2" in capsys.readouterr().err
    assert main(["inspect", str(capture), "--frame", "0", "--range-m", "5", "--velocity-mps", "99"]) == 2
    assert "--velocity-mps 99" in capsys.readouterr().err


def test_cli_png_figure(capture, tmp_path, capsys):
    out = tmp_path / "van.png"
    args = ["inspect", str(capture), "--frame", "0", "--range-m", str(VAN["range_m"]), "--velocity-mps",
            str(VAN["velocity_mps"]), "--png", str(out)]
    assert main(args) == 0
    data = out.read_bytes()
    # PNG signature and IHDR (PNG specification, W3C 2003): 1600 x 1000, 8-bit RGB
    assert data[:8] == b"\x89PNG\r\n\x1a\n" and data[12:16] == b"IHDR"
    assert int.from_bytes(data[16:20], "big") == 1600 and int.from_bytes(data[20:24], "big") == 1000
    capsys.readouterr()


def test_figure_marks_the_cell_where_its_numbers_are(van):
    from cubecast.viewer.inspectfig import InspectionFigure
    from cubecast.viewer.snapshot import offscreen_backend
    offscreen_backend()    # raises (fails the test) without an offscreen GL context
    fig = InspectionFigure(dict(van, capture="crate_van.cap", frame=0, sequence=0))
    try:
        img = fig.render()[..., :3].astype(int)
        c = van["cell"]
        for panel, xy in (("range", (c["range_m"], c["power_db"])), ("doppler", (c["velocity_mps"], c["power_db"]))):
            px = fig.data_to_pixel(panel, [xy])[0]
            col, row = int(round(px[0])), int(round(px[1]))
            ring = img[row - 9: row + 10, col - 9: col + 10]
            rose = (ring[..., 0] > 200) & (ring[..., 1] < 140) & (ring[..., 2] > 100)
            ys, xs = np.nonzero(rose)
            # the cell's ring (13 px) is drawn around the map's value at the cell
            assert len(xs) > 15 and abs(xs.mean() - 9) < 2.5 and abs(ys.mean() - 9) < 2.5, panel
        # the azimuth spectrum's curve reaches its peak at the estimate's line
        a = van["angle"]
        k = int(np.argmax(a["azimuth"]["power_db"]))
        px = fig.data_to_pixel("azimuth", [(a["azimuth"]["azimuth_deg"][k], a["azimuth"]["power_db"][k])])[0]
        est = fig.data_to_pixel("azimuth", [(a["estimate"]["azimuth_deg"], a["azimuth"]["power_db"][k])])[0]
        assert abs(px[0] - est[0]) < 12
    finally:
        fig.close()

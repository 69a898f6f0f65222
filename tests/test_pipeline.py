"""The whole chain on simulated frames, against published accuracy and detection bounds."""

from __future__ import annotations

import math

import numpy as np
import pytest

from cubecast.daemon.chain.cfar import Cfar, CfarSettings
from cubecast.daemon.chain.pipeline import Pipeline
from cubecast.daemon.errors import CubecastError
from cubecast.daemon.scene import parse_scene
from cubecast.daemon.sensor import load_sensor
from cubecast.daemon.settings import ProcessingSettings, parse_settings
from cubecast.daemon.simulate import Simulator
from tests.helpers import YARD_SENSOR, make_sensor

C = 299_792_458.0
HANN_ENBW = 1.5  # equivalent noise bandwidth of the Hann window in bins (Harris, Proc. IEEE, 1978)


@pytest.fixture(scope="module")
def sensor():
    return load_sensor(YARD_SENSOR)


def scene_of(*targets: dict) -> str:
    out = []
    for t in targets:
        out.append("[[target]]\n" + "\n".join(f"{k} = {v!r}" for k, v in t.items()))
    return "\n".join(out)


def strongest(points):
    assert len(points) > 0, "no detection"
    return points[np.argmax(points["snr_db"])]


def cell_snr_per_channel(sensor, snr_sample_db: float) -> float:
    """Per-channel SNR in the range-Doppler cell of a bin-centred target: the coherent gain of the two
    Hann-windowed FFTs is N / ENBW each (Harris 1978)."""
    return 10 ** (snr_sample_db / 10) * sensor.samples_per_chirp * sensor.n_loops / HANN_ENBW ** 2


def fisher_crb_uw(positions_m, wavelength_m, snr_per_channel):
    """Deterministic single-source CRB on direction cosines (u, w) with unknown complex amplitude,
    computed here independently: J = 2 snr (2 pi / lambda)^2 sum (p_i - mean)(p_i - mean)^T
    (Stoica and Nehorai, IEEE Trans. ASSP, 1989)."""
    p = positions_m[:, [0, 2]] / wavelength_m
    p = p - p.mean(axis=0)
    j = 2 * snr_per_channel * (2 * np.pi) ** 2 * p.T @ p
    cov = np.linalg.inv(j)
    return math.sqrt(cov[0, 0]), math.sqrt(cov[1, 1])


# ---- range and velocity ---------------------------------------------------------------------

@pytest.mark.parametrize("range_m,velocity_mps", [(3.71, 0.0), (7.33, 2.9), (12.52, -5.17), (18.9, 6.6)])
def test_range_and_velocity_within_a_tenth_of_a_cell(sensor, range_m, velocity_mps):
    # Requirement: errors at most 0.1 resolution cell at high SNR (resolutions: Richards 2005).
    sim = Simulator(sensor, parse_scene(scene_of(dict(range_m=range_m, azimuth_deg=10.0,
                                                      radial_velocity_mps=velocity_mps, snr_db=10.0))), seed=1)
    pipe = Pipeline(sensor)
    for frame in range(3):
        truth = sim.truth(frame)[0]
        p = strongest(pipe.process(sim.frame(frame)))
        assert abs(p["range_m"] - truth[6]) <= 0.1 * sensor.range_resolution_m
        assert abs(p["velocity_mps"] - truth[9]) <= 0.1 * sensor.velocity_resolution_mps


def test_point_fields_are_consistent(sensor):
    sim = Simulator(sensor, parse_scene(scene_of(dict(range_m=9.0, azimuth_deg=-25.0, elevation_deg=8.0,
                                                      snr_db=0.0))), seed=2)
    p = strongest(Pipeline(sensor).process(sim.frame(0)))
    # sensor frame convention: azimuth = atan2(x, y), elevation = asin(z / r)
    assert math.degrees(math.atan2(p["x_m"], p["y_m"])) == pytest.approx(p["azimuth_deg"], abs=1e-3)
    assert math.degrees(math.asin(p["z_m"] / p["range_m"])) == pytest.approx(p["elevation_deg"], abs=1e-3)
    assert math.hypot(p["x_m"], p["y_m"], p["z_m"]) == pytest.approx(p["range_m"], rel=1e-5)
    assert p["azimuth_deg"] < 0 and p["x_m"] < 0 and p["elevation_deg"] > 0 and p["z_m"] > 0
    for f in ("sigma_range_m", "sigma_azimuth_deg", "sigma_elevation_deg", "sigma_velocity_mps"):
        assert 0 < p[f] < 5


# ---- angle accuracy --------------------------------------------------------------------------

def monte_carlo(sensor, scene_text, trials, snr_db, seed=0, settings=None):
    """Clean frame once, fresh receiver noise per trial; returns the strongest point of each trial."""
    sim = Simulator(sensor, parse_scene(scene_text), noise=False)
    clean = sim.frame(0)
    pipe = Pipeline(sensor, settings)
    rng = np.random.default_rng(seed)
    sigma = sensor.noise_rms_counts / math.sqrt(2)
    found = []
    for _ in range(trials):
        noise = rng.standard_normal((2,) + clean.shape, dtype=np.float32) * np.float32(sigma)
        frame = clean + (noise[0] + 1j * noise[1]).astype(np.complex64)
        pts = pipe.process(frame)
        if len(pts):
            found.append(strongest(pts))
    return np.array(found), sim.truth(0)[0]


def bin_centred_range(sensor, approx_m):
    return round(approx_m / sensor.range_resolution_m) * sensor.range_resolution_m


@pytest.mark.parametrize("azimuth_deg", [-60.0, -40.0, -15.0, 0.0, 25.0, 50.0, 60.0])
def test_azimuth_rmse_within_1p5_crb(sensor, azimuth_deg):
    # Requirement: azimuth RMSE <= 1.5 x the Cramér-Rao bound (Stoica and Nehorai 1989; for a line
    # array it is Rife and Boorstyn 1974's single-tone bound). Per-channel SNR from the cell gain.
    snr_db = -20.0
    r = bin_centred_range(sensor, 10.0)
    pts, truth = monte_carlo(sensor, scene_of(dict(range_m=r, azimuth_deg=azimuth_deg, snr_db=snr_db)),
                             120, snr_db, seed=int(azimuth_deg) + 100)
    assert len(pts) >= 115
    su, _ = fisher_crb_uw(sensor.virtual_positions_m, sensor.wavelength_m, cell_snr_per_channel(sensor, snr_db))
    crb_az = math.degrees(su / math.cos(math.radians(azimuth_deg)))
    rmse = math.sqrt(np.mean((pts["azimuth_deg"] - truth[7]) ** 2))
    assert rmse <= 1.5 * crb_az, (rmse, crb_az)


@pytest.mark.parametrize("elevation_deg", [-15.0, -5.0, 0.0, 7.0, 15.0])
def test_elevation_rmse_within_1p5_crb(sensor, elevation_deg):
    snr_db = -15.0
    r = bin_centred_range(sensor, 10.0)
    pts, truth = monte_carlo(sensor, scene_of(dict(range_m=r, azimuth_deg=10.0, elevation_deg=elevation_deg,
                                                   snr_db=snr_db)), 120, snr_db, seed=int(elevation_deg) + 200)
    assert len(pts) >= 115
    _, sw = fisher_crb_uw(sensor.virtual_positions_m, sensor.wavelength_m, cell_snr_per_channel(sensor, snr_db))
    crb_el = math.degrees(sw / math.cos(math.radians(elevation_deg)))
    rmse = math.sqrt(np.mean((pts["elevation_deg"] - truth[8]) ** 2))
    assert rmse <= 1.5 * crb_el, (rmse, crb_el)


@pytest.mark.parametrize("azimuth_deg,elevation_deg", [(-60, 0), (-30, -15), (0, 0), (20, 15), (45, -8), (60, 5)])
def test_noiseless_angle_bias_below_a_tenth_degree(sensor, azimuth_deg, elevation_deg):
    sim = Simulator(sensor, parse_scene(scene_of(dict(range_m=11.3, azimuth_deg=float(azimuth_deg),
                                                      elevation_deg=float(elevation_deg), snr_db=10.0))),
                    noise=False)
    p = strongest(Pipeline(sensor).process(sim.frame(0)))
    assert abs(p["azimuth_deg"] - azimuth_deg) < 0.1
    assert abs(p["elevation_deg"] - elevation_deg) < 0.1


# ---- moving targets: TDM Doppler phase and velocity unfolding --------------------------------

@pytest.mark.parametrize("velocity_mps", [-7.0, -3.1, 4.4, 7.5])
def test_doppler_compensation_removes_angle_bias(sensor, velocity_mps):
    # In TDM, TX k transmits s_k T_c later, so a moving target adds 2 pi f_d s_k T_c to TX k's virtual
    # channels (common practice); without compensation the angle is biased.
    text = scene_of(dict(range_m=10.3, azimuth_deg=15.0, elevation_deg=5.0, radial_velocity_mps=velocity_mps,
                         snr_db=10.0))
    sim = Simulator(sensor, parse_scene(text), noise=False)
    on = strongest(Pipeline(sensor).process(sim.frame(0)))
    off = strongest(Pipeline(sensor, ProcessingSettings(doppler_compensation=False)).process(sim.frame(0)))
    assert abs(on["azimuth_deg"] - 15.0) < 0.1 and abs(on["elevation_deg"] - 5.0) < 0.1
    # the bias it removes: the TX1 block shifted by 2 pi f_d T_c against TX0, i.e. several degrees here
    assert abs(off["azimuth_deg"] - 15.0) + abs(off["elevation_deg"] - 5.0) > 1.0


@pytest.mark.parametrize("velocity_mps", [-3.1, 4.4])
def test_uncompensated_slot_phase_is_the_predicted_doppler_step(sensor, velocity_mps):
    # Without compensation, TX k's virtual channels carry the Doppler phase of its slot delay,
    # 2 pi f_d s_k T_c with f_d = 2 v / lambda (common practice). At boresight the channels' own phases
    # agree (far field), so the ratio of TX k's block to TX 0's block, receiver by receiver, is exactly
    # that step.
    text = scene_of(dict(range_m=10.3, azimuth_deg=0.0, elevation_deg=0.0, radial_velocity_mps=velocity_mps,
                         snr_db=10.0))
    sim = Simulator(sensor, parse_scene(text), noise=False)
    pipe = Pipeline(sensor, ProcessingSettings(doppler_compensation=False))
    seen = []
    estimate = pipe.angle.estimate
    pipe.angle.estimate = lambda snaps: (seen.append(np.array(snaps)), estimate(snaps))[1]
    pipe.process(sim.frame(0))
    snap = seen[0][np.argmax(np.abs(seen[0]).sum(axis=1))]
    n_rx = sensor.n_rx
    f_d = 2.0 * sim.truth(0)[0][9] / sensor.wavelength_m
    for k in range(1, sensor.n_tx):
        measured = np.angle(np.sum(snap[k * n_rx:(k + 1) * n_rx] * np.conj(snap[:n_rx])))
        predicted = 2 * np.pi * f_d * k * sensor.chirp_period_s
        assert abs(np.angle(np.exp(1j * (measured - predicted)))) < 0.02, (k, measured, predicted)


@pytest.mark.parametrize("factor", [-2.8, -1.9, -1.3, 1.2, 1.7, 2.6, 2.95])
def test_velocity_unfolded_up_to_ntx_times_tdm_limit(sensor, factor):
    # Unambiguous TDM velocity lambda / (4 N_tx T_c) (Richards 2005); unfolding tests the N_tx Doppler
    # hypotheses against the angle spectrum and must report the true velocity up to N_tx times it.
    v = factor * sensor.max_velocity_mps
    text = scene_of(dict(range_m=9.7, azimuth_deg=-12.0, radial_velocity_mps=v, snr_db=-10.0))
    sim = Simulator(sensor, parse_scene(text), seed=7)
    pipe = Pipeline(sensor)
    for frame in range(3):
        p = strongest(pipe.process(sim.frame(frame)))
        truth = sim.truth(frame)[0]
        assert p["velocity_mps"] == pytest.approx(truth[9], abs=0.1 * sensor.velocity_resolution_mps)
        assert abs(p["azimuth_deg"] - truth[7]) < 1.0


def test_without_unfolding_fast_target_aliases(sensor):
    v = 1.6 * sensor.max_velocity_mps
    sim = Simulator(sensor, parse_scene(scene_of(dict(range_m=9.7, radial_velocity_mps=v, snr_db=0.0))), seed=7)
    p = strongest(Pipeline(sensor, ProcessingSettings(velocity_unfolding=False)).process(sim.frame(0)))
    # folded into (-vmax, vmax]: v - 2 vmax
    assert p["velocity_mps"] == pytest.approx(v - 2 * sensor.max_velocity_mps, abs=0.1)


def test_bpm_sensor_angles_and_velocity():
    # BPM: both TX send in every slot with codes [[1, 1], [1, -1]]; decoding by the inverse code
    # recovers the virtual array (common practice).
    s = make_sensor(scheme="bpm", elevation_tx=False, bpm_codes=[[1, 1], [1, -1]])
    text = scene_of(dict(range_m=8.2, azimuth_deg=-20.0, radial_velocity_mps=2.0, snr_db=0.0))
    sim = Simulator(s, parse_scene(text), seed=1)
    p = strongest(Pipeline(s).process(sim.frame(0)))
    truth = sim.truth(0)[0]
    assert abs(p["azimuth_deg"] - truth[7]) < 0.5
    assert p["velocity_mps"] == pytest.approx(truth[9], abs=0.1 * s.velocity_resolution_mps)


def test_real_sampled_sensor_one_sided_spectrum():
    s = make_sensor(sampling="real", samples=256, sample_rate_hz=10.0e6)
    sim = Simulator(s, parse_scene(scene_of(dict(range_m=8.0, azimuth_deg=12.0, snr_db=5.0))), seed=3)
    pts = Pipeline(s).process(sim.frame(0))
    p = strongest(pts)
    assert p["range_m"] == pytest.approx(sim.truth(0)[0][6], abs=0.1 * s.range_resolution_m)
    assert abs(p["azimuth_deg"] - 12.0) < 0.5
    assert np.all(pts["range_m"] <= s.max_range_m)


# ---- resolution ------------------------------------------------------------------------------

@pytest.mark.parametrize("n_rx,separation_deg,method,resolved", [
    (4, 8.0, "fft", False), (8, 8.0, "fft", True), (8, 1.0, "fft", False),
    (4, 8.0, "dml", True), (8, 1.0, "dml", False)])
def test_two_targets_resolved_by_aperture(n_rx, separation_deg, method, resolved):
    # 2 TX x n_rx virtual arrays of 2 n_rx elements at lambda / 2: the Rayleigh limit is 2 / N in sine
    # space (common practice): 8 elements ~ 14.5 deg, 16 elements ~ 7.2 deg at boresight. The
    # criterion is for sources in quadrature (in phase, two targets at the limit merge): the second
    # target sits lambda / 8 further away, a quarter-wave round trip, 90 degrees. The FFT peaks alone
    # (angle_method = "fft") keep to the aperture's limit; the default model fit (dml, README "Several
    # sources in one cell") splits 8 elements at 0.55 of it at this SNR (about 34 dB in the cell), but
    # not 16 elements at 0.14 of theirs.
    s = make_sensor(n_tx_az=2, n_rx=n_rx, elevation_tx=False)
    half = separation_deg / 2
    text = scene_of(dict(range_m=9.0, azimuth_deg=-half, snr_db=0.0),
                    dict(range_m=9.0 + s.wavelength_m / 8, azimuth_deg=half, snr_db=0.0))
    sim = Simulator(s, parse_scene(text), seed=4)
    pts = Pipeline(s, ProcessingSettings(angle_method=method)).process(sim.frame(0))
    near = pts[np.abs(pts["range_m"] - 9.0) < 0.3]
    strong = near[near["snr_db"] > near["snr_db"].max() - 6]
    if resolved:
        az = np.sort(strong["azimuth_deg"])
        assert len(az) == 2 and abs(az[0] + half) < 1.0 and abs(az[1] - half) < 1.0
    else:
        assert len(strong) == 1


# ---- detection statistics --------------------------------------------------------------------

def test_false_alarm_rate_on_noise_frames(sensor):
    # Measured threshold crossings on noise-only frames against the design Pfa (the thresholds'
    # closed forms: Richards 2005 for CA, Rohling 1983 for OS), within +-5 sigma of a binomial count
    # (common practice). Neighbouring cells of a windowed map are correlated, which widens the count's
    # spread somewhat beyond the binomial; 5 sigma leaves room for that.
    settings = ProcessingSettings(cfar_pfa=1e-3)
    pipe = Pipeline(sensor, settings)
    raw = Cfar(CfarSettings(**{**pipe.cfar.settings.__dict__, "local_max": False}),
               *pipe.detection_map.shape, pipe.doppler_fft.n_channels)
    rng = np.random.default_rng(11)
    sigma = np.float32(sensor.noise_rms_counts / math.sqrt(2))
    crossings = cells = 0
    for _ in range(60):
        n = rng.standard_normal((2, sensor.chirps_per_frame, sensor.n_rx, sensor.samples_per_chirp),
                                dtype=np.float32) * sigma
        pipe.process((n[0] + 1j * n[1]).astype(np.complex64))
        det = raw.detect(pipe.detection_map)
        crossings += len(det)
        cells += (raw._r_hi - raw._r_lo) * pipe.detection_map.shape[1]
    expected = cells * 1e-3
    assert abs(crossings - expected) <= 5 * math.sqrt(expected * (1 - 1e-3)), (crossings, expected)


def albersheim_snr_db(pd: float, pfa: float, n: int) -> float:
    """Albersheim, "A closed-form approximation to Robertson's detection characteristics",
    Proc. IEEE, 1981: per-pulse SNR for n non-coherently integrated pulses, steady target."""
    a = math.log(0.62 / pfa)
    b = math.log(pd / (1 - pd))
    return -5 * math.log10(n) + (6.2 + 4.54 / math.sqrt(n + 0.44)) * math.log10(a + 0.12 * a * b + 1.7 * b)


def test_detection_probability_follows_albersheim(sensor):
    # A steady target's probability of detection against SNR: the per-channel cell SNR where Pd = 0.5
    # and 0.9 lies within 1 dB of Albersheim's equation for N = 12 channels integrated non-coherently.
    pfa = 1e-4
    settings = ProcessingSettings(cfar_pfa=pfa, cfar_kind="ca", cfar_train_range=12, cfar_train_doppler=6,
                                  cfar_guard_range=3, cfar_guard_doppler=2)
    r = bin_centred_range(sensor, 10.0)
    text = scene_of(dict(range_m=r, azimuth_deg=5.0, snr_db=0.0))
    sim = Simulator(sensor, parse_scene(text), noise=False)
    clean0 = sim.frame(0)
    pipe = Pipeline(sensor, settings)
    rng = np.random.default_rng(5)
    sigma = np.float32(sensor.noise_rms_counts / math.sqrt(2))
    cell_gain_db = 10 * math.log10(cell_snr_per_channel(sensor, 0.0))
    cell_snrs = np.arange(-1.0, 7.1, 1.0)
    pd = []
    for cell_snr in cell_snrs:
        scale = np.float32(10 ** ((cell_snr - cell_gain_db) / 20))
        hits = 0
        trials = 150
        for _ in range(trials):
            n = rng.standard_normal((2,) + clean0.shape, dtype=np.float32) * sigma
            pts = pipe.process(clean0 * scale + (n[0] + 1j * n[1]).astype(np.complex64))
            hits += bool(np.any(np.abs(pts["range_m"] - r) < 0.6 * sensor.range_resolution_m)
                         & np.any(np.abs(pts["velocity_mps"]) < sensor.velocity_resolution_mps))
        pd.append(hits / trials)
    pd = np.array(pd)
    for target_pd in (0.5, 0.9):
        measured = float(np.interp(target_pd, pd, cell_snrs))
        expected = albersheim_snr_db(target_pd, pfa, sensor.n_virtual)
        assert abs(measured - expected) <= 1.0, (target_pd, measured, expected, pd)


# ---- settings --------------------------------------------------------------------------------

def test_settings_errors_named():
    with pytest.raises(CubecastError, match=r"\[processing\] range_window = 'hanning': must be one of"):
        parse_settings('[processing]\nrange_window = "hanning"\n')
    with pytest.raises(CubecastError, match=r"unknown field cfar_pf"):
        parse_settings('[processing]\ncfar_pf = 1e-3\n')
    with pytest.raises(CubecastError, match=r"cfar_pfa = 0.7: must be between"):
        parse_settings('[processing]\ncfar_pfa = 0.7\n')
    with pytest.raises(CubecastError, match=r"range_fft_size = 100: must be 0"):
        parse_settings('[processing]\nrange_fft_size = 100\n')
    with pytest.raises(CubecastError, match=r"cfar_train_range = 'eight': must be a whole number"):
        parse_settings('[processing]\ncfar_train_range = "eight"\n')


def test_split_false_alarm_is_a_processing_setting(sensor):
    settings = parse_settings('[processing]\nangle_split_false_alarm = 0.001\n')
    assert Pipeline(sensor, settings).angle.settings.split_false_alarm == 0.001
    with pytest.raises(CubecastError, match=r"angle_split_false_alarm = 1.5: must be a probability"):
        parse_settings('[processing]\nangle_split_false_alarm = 1.5\n')


def test_max_range_beyond_sensor_rejected(sensor):
    with pytest.raises(CubecastError, match=r"max_range_m = 40.0: beyond the sensor's maximum range"):
        Pipeline(sensor, ProcessingSettings(max_range_m=40.0))


def test_wrong_frame_shape_rejected(sensor):
    with pytest.raises(CubecastError, match=r"the chain expects complex64 \(96, 4, 128\)"):
        Pipeline(sensor).process(np.zeros((96, 4, 64), np.complex64))


@pytest.mark.parametrize("window", ["rect", "hamming", "blackman", "kaiser"])
@pytest.mark.parametrize("padding", [0, 256])
def test_windows_and_zero_padding(sensor, window, padding):
    settings = ProcessingSettings(range_window=window, doppler_window=window, range_fft_size=padding,
                                  doppler_fft_size=64 if padding else 0)
    sim = Simulator(sensor, parse_scene(scene_of(dict(range_m=11.11, azimuth_deg=-7.0, radial_velocity_mps=1.3,
                                                      snr_db=0.0))), seed=9)
    p = strongest(Pipeline(sensor, settings).process(sim.frame(0)))
    truth = sim.truth(0)[0]
    # rectangular windows have higher scalloping in the log-parabolic interpolation: 0.15 of a cell
    tol = 0.15 if window == "rect" and not padding else 0.1
    assert abs(p["range_m"] - truth[6]) <= tol * sensor.range_resolution_m
    assert abs(p["velocity_mps"] - truth[9]) <= tol * sensor.velocity_resolution_mps
    assert abs(p["azimuth_deg"] - truth[7]) < 0.5


def test_static_returns_removed(sensor):
    text = scene_of(dict(range_m=6.0, azimuth_deg=-20.0, rcs_dbsm=20.0),
                    dict(range_m=11.0, azimuth_deg=15.0, radial_velocity_mps=2.0, snr_db=0.0))
    sim = Simulator(sensor, parse_scene(text), seed=1)
    pts = Pipeline(sensor, ProcessingSettings(remove_static=True)).process(sim.frame(0))
    assert not np.any((np.abs(pts["range_m"] - 6.0) < 0.3) & (np.abs(pts["velocity_mps"]) < 0.3))
    assert np.any(np.abs(pts["range_m"] - 11.0) < 0.3)


def test_deterministic(sensor):
    sim = Simulator(sensor, parse_scene(scene_of(dict(range_m=7.0, azimuth_deg=3.0, snr_db=0.0))), seed=2)
    f = sim.frame(0)
    a = Pipeline(sensor).process(f)
    b = Pipeline(sensor).process(f.copy())
    assert a.tobytes() == b.tobytes()


# ---- per-point record --------------------------------------------------------------------------

@pytest.mark.parametrize("layout", ["planar", "azimuth_only", "elevation_only"])
def test_point_kernel_matches_the_bound_functions(layout):
    # The chain fills the point records in one compiled kernel: the geometry of the sensor frame, the
    # range from the array's phase centre carried to the origin, the SNR share of secondary peaks, the
    # range and velocity sigmas of the refinement passed through, and the direction-cosine CRB written
    # out below from its paper, with the angle floor in quadrature, including the infinite ones of an
    # array without extent.
    from cubecast.daemon.chain.bounds import crb_unit_covariance
    from cubecast.daemon.chain.points import ANGLE_FLOOR_DEG, POINT_DTYPE, POINT_FIELDS, fill_points

    lam = 0.0039
    k = np.arange(8, dtype=np.float64)
    pos = {"planar": np.c_[k * lam / 2, np.zeros(8), (k % 2) * lam / 2],
           "azimuth_only": np.c_[k * lam / 2, np.zeros(8), np.zeros(8)],
           "elevation_only": np.c_[np.zeros(8), np.zeros(8), k * lam / 2]}[layout]
    rng = np.random.default_rng(5)
    n_det, n_pts = 6, 9
    det_index = np.sort(rng.integers(0, n_det, n_pts)).astype(np.int32)
    az = rng.uniform(-70, 70, n_pts).astype(np.float32)
    el = rng.uniform(-20, 20, n_pts).astype(np.float32)
    peak = rng.uniform(0.1, 10, n_pts).astype(np.float32)
    cell_snr = rng.uniform(0.5, 1e4, n_det).astype(np.float32)
    element_snr = rng.uniform(0.5, 1e5, n_det)
    range_bin = rng.uniform(1, 200, n_det)
    sigma_r, sigma_v = rng.uniform(1e-4, 1e-2, n_det), rng.uniform(1e-4, 1e-2, n_det)
    centre = np.array([0.004, 0.001, -0.002])
    doppler_hz = rng.uniform(-3e3, 3e3, n_det)
    bin_m, bias, half_wl = 0.0469, 0.012, lam / 2
    out = np.empty(n_pts, POINT_DTYPE)
    half_wl_det = half_wl * (1 + rng.uniform(-1e-3, 1e-3, n_det))   # each detection's echo frequency
    # a pose: yaw 30 deg right, pitch 10 deg up, roll -5 deg, as scipy's intrinsic z-x'-y'' Euler
    # rotation (scipy.spatial.transform.Rotation; right-handed angles, so the rightward yaw is -30 about z)
    from scipy.spatial.transform import Rotation
    pose_r = Rotation.from_euler("ZXY", [-30.0, 10.0, -5.0], degrees=True).as_matrix()
    pose_t = np.array([1.5, -0.4, 2.25])
    # each source's share of its cell's signal energy, and its bound at 2 SNR = 1 (for a lone source the
    # single-source one; AngleResult gives each source of a pair its own, see test_angle)
    first = np.zeros(n_det)
    np.maximum.at(first, det_index, peak)
    share = peak / first[det_index]
    var_u1, var_w1, cov1, has_x, has_z = crb_unit_covariance(pos, lam)
    unit = np.tile([var_u1, var_w1, cov1], (n_pts, 1))
    fill_points(range_bin, bin_m, bias, det_index, az, el, share.astype(np.float32), doppler_hz, half_wl_det,
                cell_snr, element_snr, sigma_r, sigma_v, centre, unit, has_x, has_z, pose_r, pose_t,
                out.view(np.float32).reshape(-1, len(POINT_FIELDS)))
    share = share.astype(np.float32).astype(np.float64)
    snr_pt = element_snr[det_index] * share
    a, e = np.radians(az.astype(np.float64)), np.radians(el.astype(np.float64))
    # sensor frame (project convention): x right, y boresight, z up; u the point's direction
    u_dir = np.c_[np.cos(e) * np.sin(a), np.cos(e) * np.cos(a), np.sin(e)]
    rng_m = range_bin[det_index] * bin_m - bias + u_dir @ centre
    np.testing.assert_allclose(out["range_m"], rng_m, rtol=1e-6)
    np.testing.assert_allclose(out["x_m"], rng_m * u_dir[:, 0], rtol=1e-5, atol=1e-6)
    np.testing.assert_allclose(out["y_m"], rng_m * u_dir[:, 1], rtol=1e-5, atol=1e-6)
    np.testing.assert_allclose(out["z_m"], rng_m * u_dir[:, 2], rtol=1e-5, atol=1e-6)
    platform = (rng_m[:, None] * u_dir) @ pose_r.T + pose_t
    for j, name in enumerate(("platform_x_m", "platform_y_m", "platform_z_m")):
        np.testing.assert_allclose(out[name], platform[:, j], rtol=1e-5, atol=1e-5)
    np.testing.assert_allclose(out["velocity_mps"], doppler_hz[det_index] * half_wl_det[det_index], rtol=1e-6)
    np.testing.assert_allclose(out["snr_db"], 10 * np.log10(cell_snr[det_index] * share), rtol=1e-5)
    np.testing.assert_allclose(out["sigma_range_m"], sigma_r[det_index], rtol=1e-6)
    # the sources the angle stage found in each point's cell: its detection's count of points
    np.testing.assert_array_equal(out["cell_sources"], np.bincount(det_index, minlength=n_det)[det_index])
    np.testing.assert_allclose(out["sigma_velocity_mps"], sigma_v[det_index], rtol=1e-6)
    # Direction bound written out (Stoica and Nehorai, "MUSIC, maximum likelihood and Cramer-Rao bound",
    # IEEE Trans. ASSP, 1989; one snapshot, unknown amplitude): F = 2 eta k0^2 sum_i (q_i - q_mean)(q_i - q_mean)^T
    # over q_i = (x_i, z_i) for the direction cosines (u, w); az = atan2(u, sqrt(1 - u^2 - w^2)), el = asin(w).
    k0 = 2 * np.pi / lam
    u, w = u_dir[:, 0], u_dir[:, 2]
    v = np.sqrt(np.maximum(1 - u * u - w * w, 1e-12))
    q = pos[:, [0, 2]] - pos[:, [0, 2]].mean(axis=0)
    geometry = 2 * k0 ** 2 * (q.T @ q)
    var_u = np.full(n_pts, np.inf)
    var_w = np.full(n_pts, np.inf)
    cov_uw = np.zeros(n_pts)
    has_u, has_w = geometry[0, 0] > 0, geometry[1, 1] > 0
    for i in range(n_pts):
        if has_u and has_w:
            c = np.linalg.inv(geometry * snr_pt[i])
            var_u[i], var_w[i], cov_uw[i] = c[0, 0], c[1, 1], c[0, 1]
        elif has_u:
            var_u[i] = 1 / (geometry[0, 0] * snr_pt[i])
        elif has_w:
            var_w[i] = 1 / (geometry[1, 1] * snr_pt[i])
    d_az_du, d_az_dw = 1 / v, u * w / (v * np.cos(e) ** 2)
    if has_w:
        var_az = d_az_du ** 2 * var_u + 2 * d_az_du * d_az_dw * cov_uw + d_az_dw ** 2 * var_w
    else:   # no elevation extent: the elevation is taken as known, only the u term remains
        var_az = d_az_du ** 2 * var_u
    floor2 = ANGLE_FLOOR_DEG ** 2
    np.testing.assert_allclose(out["sigma_azimuth_deg"], np.sqrt(np.degrees(np.sqrt(var_az)) ** 2 + floor2),
                               rtol=1e-4)
    np.testing.assert_allclose(out["sigma_elevation_deg"],
                               np.sqrt(np.degrees(np.sqrt(var_w) / np.cos(e)) ** 2 + floor2), rtol=1e-4)
    if layout == "azimuth_only":
        assert np.all(np.isinf(out["sigma_elevation_deg"])) and np.all(np.isfinite(out["sigma_azimuth_deg"]))
    if layout == "elevation_only":
        assert np.all(np.isinf(out["sigma_azimuth_deg"])) and np.all(np.isfinite(out["sigma_elevation_deg"]))


def test_model_error_floor_is_a_processing_setting(sensor):
    settings = parse_settings('[processing]\nangle_model_error_db = -30\n')
    assert Pipeline(sensor, settings).angle.settings.model_error_db == -30
    with pytest.raises(CubecastError, match=r"angle_model_error_db = 3.0: is relative to the cell's energy"):
        parse_settings('[processing]\nangle_model_error_db = 3.0\n')

"""Noise model from a camera.json (EMVA 1288) used by measure.

Sources: EMVA 1288 Release 4.0 Linear, Eq. 14-15 (sigma_y^2 = K^2 sigma_d^2 + sigma_q^2 +
K (mu_y - mu_y.dark)); the sensor is simulated with known gain and read noise
(ecl_quant._camsim, simulated ground truth).
"""

import json

import numpy as np
import pytest

from _media import write_simulated_camera_json
from ecl_quant.errors import InputFormatError
from ecl_quant.measure import MeasureSettings, measure
from ecl_quant.radiometry import camera_noise_model
from ecl_quant.simulate import SimulationSpec, simulate_recording


@pytest.fixture(scope="module")
def camera_json(tmp_path_factory):
    return write_simulated_camera_json(tmp_path_factory.mktemp("cam"))


def test_camera_json_converts_to_full_scale_units(camera_json):
    path, sim = camera_json
    read_var, gain, source = camera_noise_model(path)
    d = sim.truth.max_code
    # Eq. 15 rescaled by the full scale D: gain D/K e-/FS; read variance
    # (K sigma_d)^2 / D^2 + sigma_q^2 / D^2 (sigma_q^2 = 1/12 DN^2), truth within 3 %
    # for the gain (as in tests/test_camera.py); the dark variance from one 128 x 128 pair
    # has relative SD sqrt(2 / NM) = 1.1 % (EMVA 1288 Eq. 19), so 3.5 % is 3 SD.
    assert gain == pytest.approx(d / 0.45, rel=0.03)
    assert read_var == pytest.approx(((0.45 * 2.8) ** 2 + 1 / 12) / d**2, rel=0.035)
    assert "camera profile camera.json" in source


def test_measure_records_the_camera_noise_source(camera_json, tmp_path):
    path, _ = camera_json
    read_var, gain, source = camera_noise_model(path)
    folder = tmp_path / "card"
    spec = SimulationSpec(size=(96, 96), n_rows=2, n_cols=2, radius_px=8.0, spacing_px=40.0,
                          n_frames=30, encoding="tiff16", seed=4)
    simulate_recording(folder, spec)
    res = measure(folder, settings=MeasureSettings(read_var=read_var, gain=gain,
                                                   noise_source=source))
    noise = json.dumps(res.provenance)
    assert source in noise
    assert np.isfinite(res.spots_table["integral_se"]).all()


@pytest.mark.parametrize("doc", [{}, {"standard": "EMVA 1288 Release 4.0 Linear"},
                                 {"standard": "EMVA 1288", "system_gain_dn_per_e": 0.0,
                                  "dark_variance_dn2": 1.0, "provenance": {"max_code": 4095}}])
def test_bad_camera_json_is_a_typed_error(tmp_path, doc):
    p = tmp_path / "camera.json"
    p.write_text(json.dumps(doc))
    with pytest.raises(InputFormatError, match="camera.json"):
        camera_noise_model(p)

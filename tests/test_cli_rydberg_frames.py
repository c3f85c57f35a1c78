"""`benchspec rydberg FRAMES --calibration CAL.json`: frames extracted with the calibration, lines fitted as independent."""

import json
from pathlib import Path

import pytest

from benchspec.cli import main

DEMO = Path(__file__).resolve().parents[1] / "demo_images"


@pytest.fixture(scope="module")
def calibration(tmp_path_factory):
    out = tmp_path_factory.mktemp("cal") / "cal.json"
    frames = [str(DEMO / f"cfl_{k}.png") for k in (1, 2, 3)]
    assert main(["calibrate", *frames, "--dark", str(DEMO / "dark.png"), "--out", str(out)]) == 0
    return out


def test_frames_with_a_calibration_give_r_h_within_its_uncertainty(calibration, capsys):
    capsys.readouterr()
    assert main(["rydberg", str(DEMO / "tube_C.jpg"), "--calibration", str(calibration), "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    # CODATA 2018 via scipy.constants: R_inf / (1 + m_e/m_p), the reduced-mass Rydberg constant of hydrogen.
    from scipy import constants

    r_h = constants.Rydberg / (1 + constants.m_e / constants.m_p)
    assert report["codata_rydberg_per_m"] == pytest.approx(r_h, rel=1e-12)
    assert abs(report["rydberg_per_m"] - r_h) < 4 * report["uncertainty_per_m"]
    # Without the solution's covariance (see cli/practicals._run_rydberg) the budget says the lines are independent.
    budget = report["budget"]
    assert budget["calibration_between_lines"] == "independent"
    assert len(report["lines"]) >= 3 and budget["calibration_per_m"] > 0

"""The setup planner's prediction as the calibration's hint (`calibrate --hint-plan`, `--hint-nm-per-px`)."""

import json

import numpy as np
import pytest

from benchspec import simulate
from benchspec.cli import main
from benchspec.errors import InputError
from benchspec.pipeline import calibrate_frames

BENCH = simulate.Bench().with_(camera={"width_px": 960, "height_px": 540, "horizontal_fov_deg": 45.0})


@pytest.fixture(scope="module")
def setup(tmp_path_factory):
    folder = tmp_path_factory.mktemp("hint")
    rendered = simulate.render(BENCH, seed=5)
    simulate.write_frame(rendered, folder / "cfl.png")
    camera, grating = BENCH.camera, BENCH.grating
    plan = folder / "plan.json"
    with open(plan, "w") as handle:
        import contextlib

        with contextlib.redirect_stdout(handle):
            code = main(["plan", "--lines-per-mm", str(grating.lines_per_mm), "--width-px", str(camera.width_px),
                         "--hfov", str(camera.horizontal_fov_deg), "--json"])
    assert code == 0
    return folder, rendered, plan


def test_the_plans_hint_holds_the_true_dispersion_and_calibrates(setup):
    folder, rendered, plan = setup
    low, high = json.loads(plan.read_text())["calibration_hint_nm_per_px"]
    # The simulator's own pixel -> wavelength map over the lamp's Hg lines (404.7-546.1 nm, NIST ASD).
    column = np.asarray(rendered.truth["mapping"]["rectified_column_px"], float)
    wavelength = np.asarray(rendered.truth["mapping"]["wavelength_nm"], float)
    inside = (wavelength > 404.0) & (wavelength < 547.0)
    true_dispersion = np.abs(np.gradient(wavelength[inside], column[inside]))
    assert low < true_dispersion.min() and true_dispersion.max() < high
    out = folder / "cal.json"
    assert main(["calibrate", str(folder / "cfl.png"), "--hint-plan", str(plan), "--out", str(out)]) == 0
    settings = json.loads(out.read_text())["settings"]
    assert settings["hint_nm_per_px"] == pytest.approx([low, high])
    assert settings["dispersion_range_nm_per_px"] == pytest.approx([max(0.1, low), min(3.0, high)])


def test_a_hint_that_excludes_the_true_dispersion_cannot_give_a_solution_there(setup):
    _, rendered, _ = setup
    # About 0.5 nm/px on this bench; a search at 1.5-3 nm/px must refuse, not invent a solution there.
    from benchspec.errors import CalibrationError

    with pytest.raises(CalibrationError):
        calibrate_frames([rendered.image], lamp="cfl", hint_nm_per_px=(1.5, 3.0))


@pytest.mark.parametrize("argv, message", [
    (["--hint-nm-per-px", "2", "1"], "0 < LOW < HIGH"),
    (["--hint-nm-per-px", "5", "9"], "does not overlap"),
    (["--hint-nm-per-px", "0.3", "1", "--hint-plan", "PLAN"], "not both"),
    (["--hint-plan", "BAD"], "calibration_hint_nm_per_px"),
    (["--hint-plan", "NOTJSON"], "not valid JSON"),
])
def test_bad_hints_are_one_line_errors_and_write_nothing(setup, tmp_path, capsys, argv, message):
    folder, _, plan = setup
    (tmp_path / "bad.json").write_text('{"range_nm": [380, 750]}')
    (tmp_path / "notjson.json").write_text("lines_per_mm = 1000")
    names = {"PLAN": str(plan), "BAD": str(tmp_path / "bad.json"), "NOTJSON": str(tmp_path / "notjson.json")}
    argv = [names.get(a, a) for a in argv]
    out = tmp_path / "cal.json"
    assert main(["calibrate", str(folder / "cfl.png"), *argv, "--out", str(out)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and message in err[0]
    assert not out.exists()


def test_the_python_api_checks_the_hint_before_reading_frames():
    with pytest.raises(InputError, match="two numbers"):
        calibrate_frames(["does-not-exist.png"], hint_nm_per_px=(0.5,))

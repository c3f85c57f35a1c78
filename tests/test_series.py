"""The NetCDF time-series file (benchspec.series): read back with an independent reader, streamed, kept on errors.

External check: the files are read with SciPy's own NetCDF reader (``scipy.io.netcdf_file``, an
implementation of Unidata's "NetCDF Classic and 64-bit Offset Format" specification), not with
benchspec's code; a file it reads with the right dimensions, types and values follows the format.
"""

from __future__ import annotations

import warnings

import cv2
import numpy as np
import pytest
from scipy.io import netcdf_file

from benchspec import series as series_module
from benchspec import simulate
from benchspec.cli import main
from benchspec.errors import ExportError, FileFormatError, InputError
from benchspec.series import SeriesFile, read_series
from benchspec.spectrum import Spectrum

BENCH = simulate.Bench().with_(camera={"width_px": 640, "height_px": 360, "rotation_deg": 2.0}, slit={"height_px": 70.0})


def _spectrum(k: int, n: int = 50, *, calibrated: bool = True) -> Spectrum:
    rng = np.random.default_rng(k)
    intensity = rng.normal(100.0, 5.0, n).astype(np.float32).astype(np.float64)
    saturated = np.zeros(n, bool)
    saturated[k % n] = True
    provenance = {"schema": "benchspec.provenance/1", "software": {"name": "benchspec", "version": "test"},
                  "quantity": "intensity", "intensity_unit": "counts",
                  "frames": [{"path": "run.avi", "frame_index": 10 + k, "sha256": None}],
                  "band_check": {"measured": True, "moved": k == 2, "across_px": 0.25 * k},
                  "time_series_index": k, "settings": {"extraction": "optimal"}}
    return Spectrum(intensity=intensity, uncertainty=np.full(n, 2.5), pixel=np.arange(n, dtype=float),
                    wavelength_nm=np.linspace(400.0, 700.0, n) if calibrated else None,
                    wavelength_uncertainty_nm=np.full(n, 0.05) if calibrated else None,
                    saturated=saturated, provenance=provenance)


def test_a_series_reads_back_with_scipys_netcdf_reader(tmp_path):
    path = tmp_path / "run.nc"
    spectra = [_spectrum(k) for k in range(4)]
    with SeriesFile(path) as out:
        for s in spectra:
            out.write(s)
    with netcdf_file(path, "r", mmap=False) as handle:
        assert handle.version_byte == 2  # 64-bit offsets (CDF-2)
        assert handle.dimensions["column"] == 50 and handle.variables["intensity"].shape == (4, 50)
        v = handle.variables
        np.testing.assert_array_equal(v["wavelength_nm"].data, spectra[0].wavelength_nm)
        for k, s in enumerate(spectra):
            np.testing.assert_array_equal(v["intensity"].data[k], s.intensity)  # float32 values exactly
            np.testing.assert_array_equal(v["saturated"].data[k].astype(bool), s.saturated)
        np.testing.assert_array_equal(v["frame_index"].data, [10, 11, 12, 13])
        np.testing.assert_array_equal(v["band_moved"].data, [0, 0, 1, 0])
        np.testing.assert_allclose(v["band_across_px"].data, [0.0, 0.25, 0.5, 0.75])
        assert v["wavelength_nm"].units == b"nm" and handle.complete == b"yes"
        assert handle.schema == series_module.SERIES_SCHEMA.encode()
    back = read_series(path)
    assert back.n_frames == 4 and back.complete and back.sources == ["run.avi"]
    one = back.spectrum(2)
    np.testing.assert_array_equal(one.intensity, spectra[2].intensity)
    np.testing.assert_array_equal(one.wavelength_uncertainty_nm, spectra[2].wavelength_uncertainty_nm)
    assert one.provenance["frames"][0]["frame_index"] == 12 and one.provenance["settings"] == {"extraction": "optimal"}
    assert not list(tmp_path.glob(".*.tmp"))


def test_an_uncalibrated_series_has_no_wavelength_variable(tmp_path):
    path = tmp_path / "raw.nc"
    with SeriesFile(path) as out:
        out.write(_spectrum(0, calibrated=False))
    with netcdf_file(path, "r", mmap=False) as handle:
        assert "wavelength_nm" not in handle.variables and "pixel" in handle.variables
    assert read_series(path).spectrum(0).wavelength_nm is None


def test_the_file_being_written_reads_as_the_series_so_far(tmp_path, monkeypatch):
    # if the process dies, the temporary file holds every record counted in its header
    monkeypatch.setattr(series_module, "RECORD_COUNT_EVERY", 3)
    path = tmp_path / "run.nc"
    out = SeriesFile(path)
    for k in range(7):
        out.write(_spectrum(k))
    (temp,) = tmp_path.glob(".run.nc.*.tmp")
    with netcdf_file(temp, "r", mmap=False) as handle:
        assert handle.variables["intensity"].shape == (6, 50)  # counted after records 3 and 6
        np.testing.assert_array_equal(handle.variables["intensity"].data[5], _spectrum(5).intensity)
    assert not path.exists()
    out.close()
    assert read_series(path).n_frames == 7 and not temp.exists()


def test_an_error_keeps_the_spectra_made_and_says_so(tmp_path):
    path = tmp_path / "run.nc"
    with pytest.raises(RuntimeError, match="frame 3 unreadable"):
        with SeriesFile(path) as out:
            for k in range(3):
                out.write(_spectrum(k))
            raise RuntimeError("frame 3 unreadable")
    back = read_series(path)
    assert back.n_frames == 3 and not back.complete
    assert back.attributes["complete"].startswith("no: RuntimeError: frame 3 unreadable")


def test_nothing_is_written_without_a_spectrum_and_an_existing_file_is_kept(tmp_path):
    path = tmp_path / "run.nc"
    with SeriesFile(path):
        pass
    assert not path.exists() and not list(tmp_path.iterdir())
    path.write_bytes(b"keep me")
    with pytest.raises(ExportError, match="already exists; pass --force"):
        SeriesFile(path)
    assert path.read_bytes() == b"keep me"
    with SeriesFile(path, force=True) as out:
        out.write(_spectrum(0))
    assert read_series(path).n_frames == 1


def test_a_spectrum_on_another_axis_is_refused(tmp_path):
    with pytest.raises(InputError, match="another axis than the first"):
        with SeriesFile(tmp_path / "run.nc") as out:
            out.write(_spectrum(0))
            out.write(_spectrum(1, n=40))
    assert read_series(tmp_path / "run.nc").n_frames == 1


def test_other_files_are_refused_with_one_clear_message(tmp_path):
    with pytest.raises(ExportError, match="must end in .nc"):
        SeriesFile(tmp_path / "run.csv")
    (tmp_path / "bad.nc").write_bytes(b"CDF\x02" + b"\x00" * 10)
    with pytest.raises(FileFormatError, match="not a readable NetCDF series"):
        read_series(tmp_path / "bad.nc")
    with pytest.raises(FileFormatError, match="does not exist"):
        read_series(tmp_path / "missing.nc")


@pytest.fixture(scope="module")
def video_and_calibration(tmp_path_factory):
    folder = tmp_path_factory.mktemp("series")
    frames = [simulate.render(BENCH, seed=s).image for s in range(1, 5)]
    simulate.write_frame(simulate.render(BENCH, seed=1), folder / "cfl.png")
    video = folder / "run.avi"
    writer = cv2.VideoWriter(str(video), cv2.VideoWriter_fourcc(*"MJPG"), 30.0, (640, 360), True)
    for k in range(12):
        writer.write(np.ascontiguousarray(frames[k % 4][:, :, ::-1]))
    writer.release()
    cal = folder / "cal.json"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert main(["calibrate", str(folder / "cfl.png"), "--lamp", "cfl", "--out", str(cal)]) == 0
    return video, cal


def test_extract_each_into_one_netcdf_file_matches_the_csv_series(capsys, video_and_calibration, tmp_path):
    video, cal = video_and_calibration
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert main(["extract", str(video), "--calibration", str(cal), "--each", "--out", str(tmp_path / "run.nc")]) == 0
        assert main(["extract", str(video), "--calibration", str(cal), "--each", "--out", str(tmp_path / "s.csv")]) == 0
    assert "12 spectra, NetCDF" in capsys.readouterr().out
    from benchspec.io import read_spectrum

    back = read_series(tmp_path / "run.nc")
    assert back.n_frames == 12 and back.complete and back.sources == [str(video)]
    np.testing.assert_array_equal(back.frame_index, np.arange(12))
    for k in (0, 11):
        csv_spectrum = read_spectrum(tmp_path / f"s_{k:04d}.csv")
        np.testing.assert_array_equal(back.wavelength_nm, csv_spectrum.wavelength_nm)
        # the CSV keeps 9 significant digits, which hold a float32 value exactly
        np.testing.assert_array_equal(back.intensity[k], csv_spectrum.intensity.astype(np.float32))
    assert back.provenance["calibration"]["lamp"] == "cfl"


def test_a_netcdf_file_without_each_is_refused(capsys, video_and_calibration, tmp_path):
    video, cal = video_and_calibration
    code = main(["extract", str(video), "--calibration", str(cal), "--out", str(tmp_path / "one.nc")])
    err = capsys.readouterr().err
    assert code == 2 and len(err.strip().splitlines()) == 1 and "add --each" in err
    assert not list(tmp_path.iterdir())

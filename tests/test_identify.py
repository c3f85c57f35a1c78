"""Species identification, checked against NIST ASD wavelengths and CIE lamp spectra.

Test spectra are drawn by a small renderer written here (Gaussian lines from the
packaged NIST ASD line lists, seeded noise), separate from the model inside
benchspec.identify; wherever a wavelength is checked, the expected value is the
published one typed beside the check, not a value read back from the code.
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from benchspec.cli import main
from benchspec.errors import IdentificationError, InputError
from benchspec.identify import DEFAULT_SPECIES, IdentificationResult, check_wavelength_axis, identify
from benchspec.refdata import load_line_list
from benchspec.spectrum import Spectrum, as_spectrum


def render(fluxes, *, fwhm_nm=1.0, step_nm=None, low=380.0, high=720.0, snr=200.0, seed=0, continuum=None, shift_nm=0.0,
           line_factors=None):
    """Emission spectrum of the species in ``fluxes`` (symbol -> share of line flux), Gaussian lines + noise.

    ``line_factors`` (NIST wavelength nm -> factor) scales single lines, as a camera's response would.
    """
    rng = np.random.default_rng(seed)
    step = step_nm or fwhm_nm / 4.0
    wavelength = np.arange(low, high, step)
    sigma = fwhm_nm / 2.3548
    signal = np.zeros_like(wavelength)
    for symbol, share in fluxes.items():
        ll = load_line_list(symbol)
        width = np.sqrt(sigma**2 + np.where(ll.tolerance_nm > 0.1, ll.tolerance_nm / 2.3548, 0.0) ** 2)
        strength = ll.relative_intensity * np.exp(rng.normal(0.0, 0.2, ll.relative_intensity.size))
        for nist_nm, factor in (line_factors or {}).items():
            strength = np.where(np.isclose(ll.wavelength_nm, nist_nm, atol=1e-3), strength * factor, strength)
        part = (strength / width * np.exp(-0.5 * ((wavelength[:, None] - ll.wavelength_nm - shift_nm) / width) ** 2)).sum(axis=1)
        if part.sum() > 0:
            signal += share * part / (part.sum() * step)
    if continuum is not None:
        signal += continuum(wavelength) * signal.max()
    signal /= signal.max()
    noisy = signal + rng.normal(0.0, 1.0 / snr, wavelength.size)
    return as_spectrum(wavelength, noisy, uncertainty=np.full(wavelength.size, 1.0 / snr))


def _line_near(result: IdentificationResult, symbol: str, wavelength_nm: float):
    match = next(m for m in result.matches if m.symbol == symbol)
    return min(match.lines, key=lambda line: abs(line.reference_nm - wavelength_nm))


# --------------------------------------------------------------------------- NIST ASD spot checks

@pytest.mark.parametrize(
    "symbol, nist_nm",
    [
        ("He", 587.562),  # NIST ASD He I 587.5621 nm, air (from memory; quoted in the issue)
        ("Ne", 640.225),  # NIST ASD Ne I 640.2248 nm, air (NIST ASD export, see calibration/lines/Ne.csv)
        ("Ar", 696.543),  # NIST ASD Ar I 696.5431 nm, air (NIST ASD export)
        ("Kr", 587.092),  # NIST ASD Kr I 587.0915 nm, air (from memory; quoted in the issue)
        ("Xe", 467.123),  # NIST ASD Xe I 467.12258 nm, air (NIST ASD export)
    ],
)
def test_single_gas_is_identified_and_its_line_sits_at_the_nist_wavelength(symbol, nist_nm):
    spectrum = render({symbol: 1.0}, fwhm_nm=0.6, seed=1)
    result = identify(spectrum)
    assert result.verdict == "identified"
    assert result.matches[0].symbol == symbol
    assert result.matches[0].score > 0.8
    line = _line_near(result, symbol, nist_nm)
    assert abs(line.strongest_nm - nist_nm) < 0.002  # the library line is the NIST one
    assert abs(line.observed_nm - nist_nm) < 0.05  # and the observed line is found where NIST puts it
    assert abs(line.residual_nm) < 0.05


def test_balmer_lines_are_explained_with_small_residuals():
    # NIST ASD H I air wavelengths (design notes, from memory): H-alpha..H-delta
    result = identify(render({"H": 1.0}, fwhm_nm=1.0, seed=2))
    assert result.verdict == "identified" and result.best.symbol == "H"
    for nist_nm in (656.279, 486.135, 434.047):
        line = _line_near(result, "H", nist_nm)
        assert abs(line.observed_nm - nist_nm) < 0.05


def test_sodium_d_lines_blend_at_low_resolution_and_still_identify():
    # NIST ASD Na I D2 588.995, D1 589.592 nm (design notes, from memory); 0.6 nm apart, one peak at 4 nm FWHM
    result = identify(render({"Na": 1.0}, fwhm_nm=4.0, seed=3))
    assert result.best.symbol == "Na" and result.verdict == "identified"
    line = _line_near(result, "Na", 589.2)
    assert line.blend == 2
    assert 588.99 < line.reference_nm < 589.60


def test_a_calibration_shift_within_the_uncertainty_is_followed():
    spectrum = render({"He": 1.0}, fwhm_nm=1.0, seed=4, shift_nm=0.4)
    spectrum = spectrum.with_(wavelength_uncertainty_nm=np.full(spectrum.size, 0.2))
    result = identify(spectrum)
    assert result.best.symbol == "He"
    assert result.best.shift_nm == pytest.approx(0.4, abs=0.15)
    assert result.max_shift_nm == pytest.approx(0.6)
    # NIST ASD He I 587.5621 nm (from memory): the residual shows the calibration error
    assert _line_near(result, "He", 587.562).residual_nm == pytest.approx(0.4, abs=0.06)


# --------------------------------------------------------------------------- other instruments, any sampling

def test_mercury_lamp_resampled_to_5_nm_steps_is_mercury():
    # A fluorescent-tube-like spectrum tabulated at 5 nm like the CIE F-series: Hg lines integrated into
    # 5 nm bins over a broad halophosphate-like band (Hg I lines: NIST ASD, calibration/lines/Hg.csv)
    fine = render({"Hg": 1.0}, fwhm_nm=0.3, step_nm=0.05, low=377.5, high=782.5, snr=1e4, seed=5)
    edges = np.arange(377.5, 782.6, 5.0)
    cumulative = np.concatenate(([0.0], np.cumsum(fine.intensity) * 0.05))
    binned = np.diff(np.interp(edges, np.concatenate((fine.wavelength_nm - 0.025, [fine.wavelength_nm[-1] + 0.025])), cumulative)) / 5.0
    centres = 0.5 * (edges[1:] + edges[:-1])
    band = 0.15 * binned.max() * np.exp(-0.5 * ((centres - 580.0) / 60.0) ** 2)
    result = identify(as_spectrum(centres, binned + band))
    assert result.verdict == "identified"
    assert result.best.symbol == "Hg"


def test_cie_fl2_is_mercury():
    colour = pytest.importorskip("colour")
    # CIE illuminant FL2 (cool white halophosphate fluorescent lamp), 5 nm steps, from colour-science
    sd = colour.SDS_ILLUMINANTS["FL2"]
    result = identify(as_spectrum(sd.wavelengths, sd.values))
    assert result.verdict in ("identified", "mixture")
    assert result.best.symbol == "Hg"
    assert result.explained_fraction > 0.8


def test_cie_fl11_triphosphor_is_mercury_plus_cfl_phosphor():
    colour = pytest.importorskip("colour")
    # CIE illuminant FL11 (narrow-band triphosphor lamp, colour-science): Hg lines + Tb3+/Eu3+ phosphor lines
    sd = colour.SDS_ILLUMINANTS["FL11"]
    result = identify(as_spectrum(sd.wavelengths, sd.values))
    assert result.verdict == "mixture"
    assert set(result.symbols[:2]) == {"Hg", "CFL-phosphor"}


@pytest.mark.parametrize("step_nm", [0.05, 0.5, 2.0])
def test_identification_does_not_depend_on_the_sampling(step_nm):
    result = identify(render({"He": 1.0}, fwhm_nm=2.0, step_nm=step_nm, seed=6))
    assert result.verdict == "identified" and result.best.symbol == "He"


def test_fwhm_is_measured_from_the_spectrum():
    result = identify(render({"Hg": 1.0}, fwhm_nm=3.0, seed=7))
    assert result.fwhm_nm == pytest.approx(3.0, rel=0.25)


# --------------------------------------------------------------------------- mixtures

@pytest.mark.parametrize("pair", [("Ne", "Ar"), ("Hg", "Ar"), ("He", "Ne"), ("H", "He")])
def test_two_gas_mixture_puts_both_species_in_the_top_two(pair):
    result = identify(render({pair[0]: 0.6, pair[1]: 0.4}, fwhm_nm=1.5, high=760.0, seed=8))
    assert set(result.symbols[:2]) == set(pair)
    assert result.verdict == "mixture"
    fractions = {m.symbol: m.fraction for m in result.matches}
    assert fractions[pair[0]] + fractions[pair[1]] > 0.85


def test_restricting_the_candidates_changes_the_answer():
    spectrum = render({"He": 1.0}, fwhm_nm=1.0, seed=9)
    assert identify(spectrum, species=["He", "Ne"]).best.symbol == "He"
    result = identify(spectrum, species="Ar,Kr")
    assert "He" not in result.symbols
    assert result.verdict == "unknown"


# --------------------------------------------------------------------------- unknown, never a guess

def test_flat_noise_is_unknown():
    rng = np.random.default_rng(10)
    wavelength = np.arange(380.0, 720.0, 0.5)
    result = identify(as_spectrum(wavelength, 1.0 + rng.normal(0, 0.01, wavelength.size)))
    assert result.verdict == "unknown" and result.matches == ()


def test_constant_spectrum_is_unknown():
    wavelength = np.arange(380.0, 720.0, 0.5)
    result = identify(as_spectrum(wavelength, np.full(wavelength.size, 3.0)))
    assert result.verdict == "unknown" and result.matches == ()


@pytest.mark.parametrize("peak_nm, fwhm_nm", [(455.0, 22.0), (590.0, 15.0), (625.0, 18.0), (530.0, 35.0)])
def test_broad_led_is_unknown(peak_nm, fwhm_nm):
    rng = np.random.default_rng(11)
    wavelength = np.arange(380.0, 720.0, 0.4)
    led = np.exp(-0.5 * ((wavelength - peak_nm) / (fwhm_nm / 2.3548)) ** 2)
    result = identify(as_spectrum(wavelength, led + rng.normal(0, 0.005, wavelength.size)))
    assert result.verdict == "unknown"
    assert result.matches == ()
    assert any("broad" in note for note in result.notes)


@pytest.mark.parametrize("name", ["LED-B1", "LED-RGB1"])
def test_cie_led_illuminants_are_unknown(name):
    colour = pytest.importorskip("colour")
    # CIE 15:2018 LED illuminants (phosphor-converted white LED-B1, RGB LED-RGB1), from colour-science
    sd = colour.SDS_ILLUMINANTS[name]
    result = identify(as_spectrum(sd.wavelengths, sd.values))
    assert result.verdict == "unknown" and result.matches == ()


def test_planck_continuum_is_unknown():
    from benchspec.physics import planck_spectral_radiance

    rng = np.random.default_rng(12)
    wavelength = np.arange(380.0, 720.0, 0.5)
    halogen = planck_spectral_radiance(wavelength, 2856.0)  # CIE illuminant A temperature (CIE 15)
    halogen = halogen / halogen.max()
    result = identify(as_spectrum(wavelength, halogen + rng.normal(0, 0.003, wavelength.size)))
    assert result.verdict == "unknown"


def test_green_laser_is_not_a_gas():
    # DPSS green 532.0 nm (common practice, no source): one narrow line that no species' pattern explains
    rng = np.random.default_rng(13)
    wavelength = np.arange(380.0, 720.0, 0.25)
    laser = np.exp(-0.5 * ((wavelength - 532.0) / 0.5) ** 2)
    result = identify(as_spectrum(wavelength, laser + rng.normal(0, 0.002, wavelength.size)))
    assert result.verdict == "unknown"
    assert any(abs(line.wavelength_nm - 532.0) < 0.1 for line in result.unexplained)


# --------------------------------------------------------------------------- result shape

def test_to_dict_has_exactly_the_documented_keys_and_is_json():
    result = identify(render({"Ne": 0.5, "Ar": 0.5}, fwhm_nm=1.0, high=760.0, seed=14))
    payload = result.to_dict()
    assert set(payload) == {"verdict", "matches", "unexplained"}
    assert payload["verdict"] in ("identified", "mixture", "uncertain", "unknown")
    for match in payload["matches"]:
        assert set(match) == {"symbol", "score", "fraction", "lines"}
        assert 0.0 <= match["score"] <= 1.0 and 0.0 <= match["fraction"] <= 1.0
        assert all({"observed_nm", "reference_nm", "residual_nm"} <= set(line) for line in match["lines"])
    scores = [m["score"] for m in payload["matches"]]
    assert scores == sorted(scores, reverse=True)
    json.dumps(payload)


def test_result_is_frozen_and_input_is_untouched():
    spectrum = render({"He": 1.0}, seed=15)
    before = spectrum.intensity.copy()
    result = identify(spectrum)
    np.testing.assert_array_equal(spectrum.intensity, before)
    with pytest.raises(AttributeError):
        result.verdict = "unknown"  # type: ignore[misc]
    assert not result.components["He"].flags.writeable


def test_default_candidates_are_the_library():
    assert set(DEFAULT_SPECIES) == {"H", "He", "Ne", "Ar", "Kr", "Xe", "Hg", "Na", "CFL-phosphor"}


# --------------------------------------------------------------------------- bad input

def test_spectrum_without_wavelength_axis_is_refused():
    spectrum = Spectrum(intensity=np.ones(100), uncertainty=np.ones(100), pixel=np.arange(100.0))
    with pytest.raises(IdentificationError, match="no wavelength axis"):
        identify(spectrum)


def test_nan_intensity_is_refused():
    wavelength = np.arange(400.0, 500.0, 1.0)
    values = np.ones(wavelength.size)
    values[7] = np.nan
    spectrum = Spectrum(intensity=values, uncertainty=np.ones(wavelength.size), pixel=np.arange(wavelength.size, dtype=float), wavelength_nm=wavelength)
    with pytest.raises(IdentificationError, match=r"intensity has 1 NaN .* sample 7"):
        identify(spectrum)


def test_nan_wavelength_is_refused():
    wavelength = np.arange(400.0, 500.0, 1.0)
    wavelength[3] = np.nan
    with pytest.raises(IdentificationError, match="wavelength has 1 NaN"):
        check_wavelength_axis(wavelength)


def test_decreasing_wavelengths_are_refused():
    with pytest.raises(IdentificationError, match="not increasing: 420 nm at sample 2 is followed by 419"):
        check_wavelength_axis([400.0, 410.0, 420.0, 419.0, 430.0])


def test_repeated_wavelengths_are_refused():
    with pytest.raises(IdentificationError, match="410 nm is repeated"):
        check_wavelength_axis([400.0, 410.0, 410.0, 420.0])


@pytest.mark.parametrize(
    "low, high, hint",
    [(100.0, 290.0, "300-1100"), (1120.0, 1500.0, "300-1100"), (1070.0, 1400.0, "at least 50 nm"),
     (4000.0, 7000.0, "angstrom"), (0.4, 0.7, "micrometres")],
)
def test_range_outside_300_1100_nm_is_refused(low, high, hint):
    wavelength = np.linspace(low, high, 200)
    with pytest.raises(IdentificationError, match=hint):
        identify(as_spectrum(wavelength, np.ones(200)))


def test_a_spectrum_reaching_past_300_1100_nm_is_cropped_not_refused():
    # A camera frame's far edges calibrate to wavelengths below 300 nm; the part inside 300-1100 nm is used.
    wavelength = np.linspace(60.0, 870.0, 1600)
    intensity = np.full(wavelength.size, 1.0)
    for centre in (656.279, 486.135, 434.047):  # H I Balmer lines, NIST ASD
        intensity += 100 * np.exp(-0.5 * ((wavelength - centre) / 1.0) ** 2)
    result = identify(as_spectrum(wavelength, intensity))
    assert result.matches and result.matches[0].symbol == "H"


def test_too_short_spectrum_is_refused():
    with pytest.raises(IdentificationError, match="at least 16"):
        identify(as_spectrum(np.arange(400.0, 410.0), np.ones(10)))


@pytest.mark.parametrize(
    "options, message",
    [
        ({"species": ["Xx"]}, "unknown species 'Xx'"),
        ({"species": []}, "no candidate species"),
        ({"fwhm_nm": -1.0}, "`fwhm_nm` must be within"),
        ({"max_shift_nm": 20.0}, "`max_shift_nm` must be within"),
        ({"intensity_tolerance": 0.5}, "`intensity_tolerance` must be a factor"),
        ({"min_snr": 0.0}, "`min_snr` must be positive"),
    ],
)
def test_bad_options_are_refused(options, message):
    spectrum = render({"He": 1.0}, seed=16)
    with pytest.raises(InputError, match=message):
        identify(spectrum, **options)


def test_non_spectrum_input_is_refused():
    with pytest.raises(InputError, match="must be a benchspec Spectrum"):
        identify(np.ones(100))


# --------------------------------------------------------------------------- command line

def _write_csv(path, spectrum, header="wavelength_nm,intensity", comment="# invented bench: tube B3 on the back shelf"):
    lines = [comment, header] + [f"{w:.4f},{v:.6f}" for w, v in zip(spectrum.wavelength_nm, spectrum.intensity)]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def test_cli_json_output(tmp_path, capsys):
    path = _write_csv(tmp_path / "tube.csv", render({"He": 1.0}, fwhm_nm=1.0, seed=17))
    assert main(["identify", str(path), "--json"]) == 0
    payload = json.loads(capsys.readouterr().out)
    assert payload["verdict"] == "identified"
    assert payload["matches"][0]["symbol"] == "He"


def test_cli_table_for_people_and_plain_two_column_csv(tmp_path, capsys):
    path = _write_csv(tmp_path / "other.csv", render({"Ne": 1.0}, fwhm_nm=1.0, seed=18), header="wavelength,intensity", comment="")
    assert main(["identify", str(path)]) == 0
    out = capsys.readouterr().out
    assert "verdict: identified: Ne (neon)" in out
    assert "observed nm -> NIST nm" in out


def test_cli_species_option(tmp_path, capsys):
    path = _write_csv(tmp_path / "tube.csv", render({"He": 1.0}, fwhm_nm=1.0, seed=19))
    assert main(["identify", str(path), "--json", "--species", "Ar,Kr"]) == 0
    payload = json.loads(capsys.readouterr().out)
    assert all(m["symbol"] in ("Ar", "Kr") for m in payload["matches"])


def test_a_matched_line_far_weaker_than_expected_is_not_also_listed_as_missing():
    """He I 388.865 nm (NIST ASD, air; packaged calibration/lines/He.csv) at 1/20 of its listed strength.

    That is what a webcam behind glass makes of the UV edge (the line list's own note: "most webcams see
    little", common practice, no source). 1/20 is well below the 1/8 (half of 1/intensity_tolerance) under
    which a line counts as missing, and well above the noise: the line is seen and matched, and must then
    be reported as seen but weaker than expected, never as expected but missing.
    """
    from benchspec.cli.identify import format_result

    spectrum = render({"He": 1.0}, fwhm_nm=1.0, seed=23, line_factors={388.865: 0.05})
    result = identify(spectrum)
    assert result.verdict == "identified" and result.best.symbol == "He"
    he = result.best
    seen = _line_near(result, "He", 388.865)
    # seen where NIST puts it: a quarter of the 1 nm FWHM, several times the ~FWHM/SNR = 0.07 nm scatter
    # of a half-maximum centroid at SNR ~15
    assert abs(seen.observed_nm - 388.865) < 0.25
    assert 388.865 not in he.missing_nm  # it is matched, so it is not missing
    assert 388.865 in he.weaker_nm
    # no line listed as missing lies within one FWHM of a matched peak (it would be part of that peak)
    matched = [line.observed_nm for line in he.lines]
    assert all(min(abs(w - o) for o in matched) > result.fwhm_nm for w in he.missing_nm)
    table = format_result(result)
    printed = f"{388.865:.2f}"
    assert f"{seen.observed_nm:9.2f} -> {388.865:9.3f}" in table  # in the matched table...
    assert f"far weaker than the NIST ratios predict: {printed}" in table  # ...said to be weak...
    assert not any(printed in row for row in table.splitlines() if "expected but missing" in row)  # ...not missing


def test_cli_lists_every_line_nothing_explains(tmp_path, capsys):
    """He + Ne lines (NIST ASD, packaged calibration/lines/) judged against He alone: the Ne lines stay unexplained.

    The table must name every one of them, as many as the note counts (it stopped at 12 before).
    """
    from benchspec.io import read_spectrum

    path = _write_csv(tmp_path / "tube.csv", render({"He": 0.5, "Ne": 0.5}, fwhm_nm=1.0, seed=21))
    result = identify(read_spectrum(path), species=["He"])  # what the command sees
    assert len(result.unexplained) > 12  # more than the old cut-off, or the test proves nothing
    assert main(["identify", str(path), "--species", "He"]) == 0
    out = capsys.readouterr().out
    assert f"{len(result.unexplained)} observed line(s) are not explained" in out
    for line in result.unexplained:
        assert f"{line.wavelength_nm:.2f} nm (SNR {line.snr:.0f})" in out


@pytest.mark.parametrize(
    "body, message",
    [
        ("pixel,intensity\n" + "".join(f"{i},{1 + (i % 7)}\n" for i in range(50)), "no wavelength axis"),
        ("wavelength_nm,intensity\n" + "".join(f"{4000 + 10 * i},{1 + (i % 7)}\n" for i in range(50)), "300-1100 nm"),
    ],
)
def test_cli_bad_file_exits_2_with_one_line(tmp_path, capsys, body, message):
    path = tmp_path / "bad.csv"
    path.write_text(body, encoding="utf-8")
    assert main(["identify", str(path)]) == 2
    err = capsys.readouterr().err
    assert message in err
    assert err.count("\n") == 1 and "Traceback" not in err


# --------------------------------------------------------------------------- virtual bench, end to end

@pytest.fixture(scope="module")
def bench_spectra():
    """The packaged demo frames (rendered by the virtual bench) through calibration and extraction."""
    import warnings

    from benchspec import demo
    from benchspec.pipeline import calibrate_frames, extract_frames

    folder = demo.demo_folder()
    dark = [folder / "dark.png"]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        calibration = calibrate_frames([folder / f"cfl_{i}.png" for i in (1, 2, 3)], lamp="cfl", dark=dark)
        names = ("tube_A", "tube_B", "tube_C", "led", "laser", "halogen")
        spectra = {name: extract_frames([folder / f"{name}.jpg"], calibration, dark=dark) for name in names}
    truth = {name: json.loads((folder / f"{name}.truth.json").read_text(encoding="utf-8"))["bench"]["source"] for name in names}
    return spectra, truth


@pytest.mark.parametrize("name", ["tube_A", "tube_B", "tube_C"])
def test_virtual_bench_tubes_are_identified_as_the_lamp_they_were_rendered_from(bench_spectra, name):
    from benchspec.refdata import load_lamp

    spectra, truth = bench_spectra
    expected = load_lamp(truth[name]["name"]).species  # the truth sidecar names the lamp
    result = identify(spectra[name])
    assert result.verdict == "identified"
    assert (result.best.symbol,) == expected


@pytest.mark.parametrize("name", ["led", "laser", "halogen"])
def test_virtual_bench_sources_outside_the_library_are_unknown(bench_spectra, name):
    spectra, _ = bench_spectra
    result = identify(spectra[name])
    assert result.verdict == "unknown" and result.matches == ()

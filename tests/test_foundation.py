"""The package's public surface, error tree and reference-data loading."""

import inspect

import pytest

import benchspec
from benchspec import errors, refdata, safety
from benchspec.cli import main


def test_all_matches_public_error_classes():
    public = {name for name, obj in inspect.getmembers(errors, inspect.isclass) if obj.__module__ == errors.__name__}
    assert public == set(errors.__all__)


def test_every_error_is_a_benchspec_error_and_one_line():
    for name in errors.__all__:
        cls = getattr(errors, name)
        if issubclass(cls, Warning):
            continue
        err = cls("first line\n second line")
        assert isinstance(err, errors.BenchspecError)
        assert "\n" not in str(err)


def test_unknown_species_error_lists_the_known_ones():
    with pytest.raises(errors.InputError, match="unknown species 'Xx'.*Hg"):
        refdata.load_line_list("Xx")


def test_unknown_lamp_error_names_the_choices():
    with pytest.raises(errors.InputError, match="unknown lamp 'nope'; choose one of: .*cfl"):
        refdata.load_lamp("nope")


def test_every_line_list_names_its_source_and_is_in_air():
    for species in refdata.available_species():
        line_list = refdata.load_line_list(species)
        assert line_list.source.strip(), species
        assert line_list.medium == "air"
        assert len(line_list.lines) >= 1


def test_every_lamp_has_cautions_and_existing_line_lists():
    for name in refdata.available_lamps():
        lamp = refdata.load_lamp(name)
        title, items = safety.cautions_for(lamp.source_type)
        assert items
        assert lamp.line_lists()


def test_mercury_lines_match_nist_asd():
    # NIST Atomic Spectra Database, Hg I air wavelengths (strong-lines table), values as
    # quoted in the project's design notes (written from memory there).
    expected = [404.656, 407.784, 435.833, 546.075, 576.961, 579.067]
    listed = refdata.load_line_list("Hg").wavelength_nm
    for wavelength in expected:
        assert abs(listed - wavelength).min() < 0.0005


def test_cautions_command_prints_every_source_and_defers_to_local_rules(capsys):
    assert main(["cautions"]) == 0
    out = capsys.readouterr().out
    for source_type in safety.SOURCE_TYPES:
        assert safety.cautions_for(source_type)[0] in out
    assert "safety rules" in out and "local regulations" in out
    assert "several kilovolts" in out and "mercury" in out.lower()

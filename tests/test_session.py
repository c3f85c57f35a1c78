"""The capture log: names never collide, nothing is overwritten or lost, reload restores the screen."""

from __future__ import annotations

import datetime as dt
import errno
import hashlib
import json
import os
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings, strategies as st

from benchspec import Spectrum
from benchspec import io as bio
from benchspec import session as bsession
from benchspec.cli import main
from benchspec.errors import ExportError, FileFormatError, InputError
from benchspec.session import Session, log_capture


def _tree(folder: Path) -> dict:
    """Every file under ``folder`` with the SHA-256 of its bytes."""
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest() for p in sorted(folder.rglob("*")) if p.is_file()}


@pytest.fixture
def spectrum(rng):
    pixel = np.arange(200.0)
    return Spectrum(intensity=rng.normal(100, 10, 200), uncertainty=np.full(200, 3.0), pixel=pixel,
                    wavelength_nm=400 + 0.5 * pixel + 1e-4 * pixel**2, saturated=pixel % 50 == 0,
                    provenance=bio.build_provenance(settings={"gamma": "srgb"}, source_type="fluorescent"))


@pytest.fixture
def session(tmp_path):
    return Session.create(tmp_path / "séance du mardi", title="Bench B, Tuesday")


@pytest.fixture
def frozen_clock(monkeypatch):
    moment = dt.datetime(2026, 12, 1, 19, 30, 12, tzinfo=dt.timezone.utc)
    monkeypatch.setattr(bsession, "_utc_now", lambda: moment)
    return moment


def test_capture_round_trip_restores_everything(session, spectrum, rng):
    colour16 = rng.integers(0, 65535, (48, 64, 3), dtype=np.uint16)  # 16-bit colour frame (RGB)
    mono8 = rng.integers(0, 255, (48, 64), dtype=np.uint8)
    linear = rng.random((8, 8)).astype(np.float32)
    record = session.add_capture(
        spectrum=spectrum, frames=[colour16, mono8, linear], dark_frames=[mono8], calibration={"rms_nm": 0.04, "lamp": "cfl"},
        metadata={"exposure_ms": 33, "note": "tube A"}, view={"x_range_nm": [400, 700], "mode": "live"},
        label="CFL on bench B", source_type="fluorescent",
    )
    reopened = Session.open(session.path)
    assert reopened.problems == () and [r.id for r in reopened.captures] == [record.id]
    assert reopened.title == "Bench B, Tuesday"
    capture = reopened.load_capture(record.id)
    np.testing.assert_array_equal(capture.frames[0], colour16)
    assert capture.frames[0].dtype == np.uint16
    np.testing.assert_array_equal(capture.frames[1], mono8)
    np.testing.assert_array_equal(capture.frames[2], linear)
    for name in ("intensity", "uncertainty", "pixel", "wavelength_nm", "saturated"):
        assert np.array_equal(getattr(capture.spectrum, name), getattr(spectrum, name))
    assert capture.spectrum.provenance == spectrum.provenance
    assert capture.calibration == {"rms_nm": 0.04, "lamp": "cfl"}
    assert capture.record.metadata == {"exposure_ms": 33, "note": "tube A"}
    assert capture.record.view["x_range_nm"] == [400, 700]
    assert set(record.files_with_role("dark")) == {"dark-000.png"}
    assert bio.read_spectrum(record.folder / "spectrum.csv").size == spectrum.size


def test_frames_given_as_files_are_kept_byte_for_byte(session, tmp_path):
    original = tmp_path / "caméra 1.jpg"
    original.write_bytes(b"\xff\xd8\xff bytes as the camera wrote them")
    record = session.add_capture(frames=[original], label="as given")
    assert (record.folder / "frame-000.jpg").read_bytes() == original.read_bytes()


def test_names_never_collide(session, spectrum, frozen_clock):
    first = session.add_capture(spectrum=spectrum)
    second = session.add_capture(spectrum=spectrum)  # the same second
    assert (first.id, second.id) == ("20261201T193012Z-001", "20261201T193012Z-002")
    # Another program took the next name meanwhile: the counter moves on, nothing is reused.
    (session.capture_folder / "20261201T193012Z-003").mkdir()
    third = session.add_capture(spectrum=spectrum)
    assert third.id == "20261201T193012Z-004"
    assert len({first.folder, second.folder, third.folder}) == 3


def test_nothing_is_overwritten(tmp_path, session, spectrum):
    session.add_capture(spectrum=spectrum)
    before = _tree(session.path)
    with pytest.raises(ExportError, match="already a session"):
        Session.create(session.path)
    again = Session.create(session.path, exist_ok=True)  # explicit: open the existing one
    assert len(again.captures) == 1
    other = tmp_path / "holiday photos"
    other.mkdir()
    (other / "beach.jpg").write_bytes(b"x")
    with pytest.raises(ExportError, match="not empty and is not a session"):
        Session.create(other)
    assert _tree(session.path) == before and _tree(other) == {"beach.jpg": hashlib.sha256(b"x").hexdigest()}


class _FullDiskAfter:
    """os.fdopen replacement: the n-th file written fills the disk (ENOSPC)."""

    def __init__(self, n):
        self.count = 0
        self.n = n
        self.real = os.fdopen

    def __call__(self, fd, mode):
        self.count += 1
        handle = self.real(fd, mode)
        if self.count < self.n:
            return handle
        handle.write = lambda data: (_ for _ in ()).throw(OSError(errno.ENOSPC, "No space left on device"))
        return handle


def test_full_disk_during_a_capture_loses_nothing(session, spectrum, rng, monkeypatch):
    kept = session.add_capture(spectrum=spectrum, label="earlier")
    before = _tree(session.path)
    monkeypatch.setattr(bio.os, "fdopen", _FullDiskAfter(3))  # third file of the new capture fails
    with pytest.raises(ExportError, match="disk is full"):
        session.add_capture(spectrum=spectrum, frames=[rng.integers(0, 255, (8, 8), dtype=np.uint8)] * 2, label="later")
    monkeypatch.undo()
    assert _tree(session.path) == before  # the earlier capture is intact, no half capture left
    reopened = Session.open(session.path)
    assert [r.id for r in reopened.captures] == [kept.id] and reopened.problems == ()


def test_read_only_session_folder(session, spectrum, monkeypatch):
    before = _tree(session.path)
    real_mkdir = Path.mkdir

    def refuse(self, *args, **kwargs):
        if self.parent == session.capture_folder:
            raise OSError(errno.EROFS, "Read-only file system")
        return real_mkdir(self, *args, **kwargs)

    monkeypatch.setattr(Path, "mkdir", refuse)  # chmod does not stop root: simulate the refusal
    with pytest.raises(ExportError, match="read-only.*earlier captures are intact"):
        session.add_capture(spectrum=spectrum)
    assert _tree(session.path) == before


def test_bad_input_leaves_no_trace(session):
    before = _tree(session.path)
    with pytest.raises(InputError, match="shape"):
        session.add_capture(frames=[np.zeros((2, 2, 2), np.uint8)])
    with pytest.raises(InputError, match="unknown source type"):
        session.add_capture(frames=[np.zeros((2, 2), np.uint8)], source_type="volcano")
    with pytest.raises(InputError, match="not JSON-serialisable"):
        session.add_capture(frames=[np.zeros((2, 2), np.uint8)], metadata={"camera": object()})
    assert _tree(session.path) == before and not any(session.capture_folder.iterdir())


def test_corrupt_session_manifest_is_reported_and_nothing_lost(session, spectrum):
    session.add_capture(spectrum=spectrum)
    manifest = session.path / "session.json"
    manifest.write_bytes(manifest.read_bytes()[:20])  # truncated by a crash or a pulled USB stick
    before = _tree(session.path)
    with pytest.raises(FileFormatError, match="session.json is not valid JSON.*captures .* are untouched") as info:
        Session.open(session.path)
    assert "\n" not in str(info.value)
    assert _tree(session.path) == before


def test_bad_captures_are_listed_not_fatal(session, spectrum):
    good = session.add_capture(spectrum=spectrum, label="good")
    corrupt = session.add_capture(spectrum=spectrum, label="corrupt")
    (corrupt.folder / "capture.json").write_text("{not json", encoding="utf-8")
    wrong_version = session.add_capture(spectrum=spectrum, label="future")
    data = json.loads((wrong_version.folder / "capture.json").read_text(encoding="utf-8"))
    data["schema_version"] = 9
    (wrong_version.folder / "capture.json").write_text(json.dumps(data), encoding="utf-8")
    escaping = session.add_capture(spectrum=spectrum, label="escape")
    data = json.loads((escaping.folder / "capture.json").read_text(encoding="utf-8"))
    data["files"]["../../session.json"] = {"sha256": "0" * 64, "role": "frame"}
    (escaping.folder / "capture.json").write_text(json.dumps(data), encoding="utf-8")
    (session.capture_folder / "20261201T000000Z-001").mkdir()  # an interrupted capture
    before = _tree(session.path)
    reopened = Session.open(session.path)
    assert [r.id for r in reopened.captures] == [good.id]
    problems = " | ".join(reopened.problems)
    assert "not valid JSON" in problems and "version 9" in problems and "not a plain file name" in problems
    assert "interrupted capture" in problems
    assert _tree(session.path) == before  # loading never deletes or rewrites anything


def test_tampered_file_is_detected_on_load(session, spectrum):
    record = session.add_capture(spectrum=spectrum)
    path = record.folder / "spectrum.json"
    path.write_text(path.read_text(encoding="utf-8").replace("[", "[ ", 1), encoding="utf-8")
    with pytest.raises(FileFormatError, match="does not match the hash"):
        Session.open(session.path).load_capture(record.id)


def test_screen_state_is_restored(session, spectrum):
    a = session.add_capture(spectrum=spectrum, label="a", view={"mode": "live"})
    b = session.add_capture(spectrum=spectrum.with_(intensity=spectrum.intensity * 2), label="b", view={"mode": "frozen"})
    # No saved screen: the latest capture with its own view.
    state = Session.open(session.path).restore_screen()
    assert state.shown == (b.id,) and state.view == {"mode": "frozen"}
    session.save_screen(shown=[a.id, b.id], active=a.id, view={"mode": "overlay", "y_log": False})
    state = Session.open(session.path).restore_screen()
    assert state.shown == (a.id, b.id) and state.active == a.id and state.view == {"mode": "overlay", "y_log": False}
    np.testing.assert_array_equal(state.captures[1].spectrum.intensity, spectrum.intensity * 2)
    with pytest.raises(InputError, match="not in session"):
        session.save_screen(shown=["nope"])
    (session.path / "screen.json").write_text("[]", encoding="utf-8")
    state = Session.open(session.path).restore_screen()
    assert state.shown == (b.id,) and "showing the latest capture" in state.problems[0]


def test_capture_lookup(session, spectrum):
    with pytest.raises(InputError, match="no captures"):
        session.record("latest")
    record = session.add_capture(spectrum=spectrum)
    assert session.record("latest") == record and session.record(record.id[:10]) == record
    with pytest.raises(InputError, match="not a capture"):
        session.record("1999")
    # by number, as `session list` shows them (1 = first); a year stays a prefix of the ids
    second = session.add_capture(spectrum=spectrum)
    assert session.record("1") == record and session.record("2") == second and session.record("002") == second
    with pytest.raises(InputError, match="matches several"):  # both ids start with the same year
        session.record(record.id[:4])
    with pytest.raises(InputError, match="numbered 1-2"):
        session.record("3")


def test_session_commands(tmp_path, spectrum, capsys):
    spec = bio.write_spectrum(spectrum, tmp_path / "lamp B.json")
    folder = tmp_path / "log é"
    assert main(["session", "add", str(folder), "--spectrum", str(spec), "--meta", "exposure_ms=33", "--note", "tube A"]) == 0
    assert "logged capture" in capsys.readouterr().out
    assert main(["session", "list", str(folder)]) == 0
    assert "1 capture(s)" in capsys.readouterr().out
    assert main(["session", "show", str(folder), "--json"]) == 0
    shown = json.loads(capsys.readouterr().out)
    assert shown["metadata"]["exposure_ms"] == 33 and shown["source_type"] == "fluorescent"
    out = tmp_path / "copy.jdx"
    assert main(["session", "export", str(folder), "latest", "--out", str(out)]) == 0
    assert bio.read_spectrum(out).size == spectrum.size
    assert main(["session", "export", str(folder), "latest", "--out", str(out)]) == 2  # no overwrite
    assert main(["session", "new", str(folder)]) == 2
    assert main(["session", "list", str(tmp_path / "nothing here")]) == 2
    assert "does not exist" in capsys.readouterr().err


def test_log_capture_creates_the_session(tmp_path, spectrum):
    record = log_capture(tmp_path / "new log", title="fair", spectrum=spectrum)
    assert Session.open(tmp_path / "new log").title == "fair" and record.folder.is_dir()


def test_convert_command(tmp_path, capsys):
    plain = tmp_path / "other instrument.txt"
    plain.write_text("Wavelength (nm)\tCounts\n500.0\t10\n500.5\t12\n501.0\t11\n", encoding="utf-8")
    out = tmp_path / "converted.jdx"
    assert main(["convert", str(plain), str(out)]) == 0
    np.testing.assert_array_equal(bio.read_spectrum(out).intensity, [10, 12, 11])
    assert main(["convert", str(plain), str(out)]) == 2
    assert main(["convert", str(plain), str(tmp_path / "x.docx")]) == 2


json_values = st.recursive(
    st.none() | st.booleans() | st.integers(-5, 5) | st.floats(allow_nan=False, allow_infinity=False) | st.text(max_size=8),
    lambda children: st.lists(children, max_size=4) | st.dictionaries(st.text(max_size=8), children, max_size=4),
    max_leaves=12,
)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(manifest=json_values | st.fixed_dictionaries({
    "schema": st.just("benchspec.capture"), "schema_version": st.just(1),
    "id": st.just("20261201T193012Z-001") | st.text(max_size=24),
    "created_utc": st.just("2026-12-01T19:30:12Z") | json_values, "label": st.just("x") | json_values,
    "files": st.dictionaries(st.sampled_from(["spectrum.json", "frame-000.png", "frame-001.npy", "a/b", ".."]),
                             st.fixed_dictionaries({"sha256": st.just("0" * 64) | json_values,
                                                    "role": st.sampled_from(["frame", "spectrum", "calibration", "x"])}),
                             max_size=3) | json_values,
    "metadata": st.just({}) | json_values, "view": st.just({}) | json_values,
    "source_type": st.none() | json_values}),
    screen=json_values | st.fixed_dictionaries({"schema": st.just("benchspec.screen"), "schema_version": st.just(1),
                                                "shown": st.just(["20261201T193012Z-001"]) | json_values,
                                                "active": json_values, "view": json_values}),
    contents=st.binary(max_size=64))
def test_hostile_manifests_never_crash_loading(tmp_path_factory, manifest, screen, contents):
    folder = tmp_path_factory.mktemp("hostile")
    session = Session.create(folder / "s")
    capture = session.capture_folder / "20261201T193012Z-001"
    capture.mkdir()
    for name in ("spectrum.json", "frame-000.png", "frame-001.npy"):
        (capture / name).write_bytes(contents)
    (capture / "capture.json").write_text(json.dumps(manifest), encoding="utf-8")
    (session.path / "screen.json").write_text(json.dumps(screen), encoding="utf-8")
    reopened = Session.open(session.path)  # never raises: a bad capture is a listed problem
    state = reopened.restore_screen()
    assert isinstance(state.problems, tuple)

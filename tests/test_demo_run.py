"""``benchspec demo`` end to end: every output written, and each spectrum traceable to the calibration file."""

import hashlib
import json

from benchspec.cli import main


def test_demo_writes_traceable_spectra_and_says_which_step_warned(tmp_path, capsys):
    out = tmp_path / "demo"
    assert main(["demo", "--out", str(out)]) == 0
    text = capsys.readouterr().out
    cal = out / "calibration.json"
    digest = hashlib.sha256(cal.read_bytes()).hexdigest()
    # every spectrum's provenance names the calibration file it was made with, and its hash
    # (the demo passed the object in memory before: "calibration: None sha256=None")
    for name in ("tube_A", "tube_B", "tube_C", "daylight", "laser"):
        line = next(l for l in (out / f"{name}.csv").read_text().splitlines() if l.startswith("# provenance-json:"))
        provenance = json.loads(line.split(":", 1)[1])
        assert provenance["calibration"]["path"] == str(cal)
        assert provenance["calibration"]["sha256"] == digest
    # a warning is said under the step it belongs to (the demo laser's saturated peak)
    lines = text.splitlines()
    laser = next(k for k, l in enumerate(lines) if l.strip().startswith("laser:"))
    assert "saturated" in lines[laser + 1] and "warning" in lines[laser + 1]
    assert (out / "report_tube_A.pdf").stat().st_size > 10_000

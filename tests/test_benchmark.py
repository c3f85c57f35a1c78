"""``benchspec benchmark``: the quick speed benchmark runs and reports sane figures.

No timing is asserted (speed is measured, not tested; DEVELOPERS.md): these
tests fail only when the benchmark crashes or its result loses its shape.
"""

import contextlib
import io
import json
import math

import pytest

from benchspec.benchmarks import speed
from benchspec.cli import benchmark as benchmark_cli
from benchspec.cli import main


@pytest.fixture(scope="module")
def quick_run(tmp_path_factory):
    out = tmp_path_factory.mktemp("bench") / "speed.json"
    stdout = io.StringIO()
    with contextlib.redirect_stdout(stdout):
        code = main(["benchmark", "--quick", "--json", "--out", str(out)])
    return code, stdout.getvalue(), out


def _positive(value) -> bool:
    return isinstance(value, (int, float)) and math.isfinite(value) and value > 0


def test_quick_speed_benchmark_prints_json_with_every_stage(quick_run):
    code, text, _ = quick_run
    assert code == 0
    result = json.loads(text)
    assert result["schema"] == speed.SCHEMA and result["quick"] is True
    assert result["machine"]["cpu_count"] >= 1
    # the interpreter's pace on this host, by which runs on a shared machine are compared
    assert _positive(result["machine"]["interpreter_pace_ms"])
    (size,) = result["sizes"]  # quick: one size
    assert (size["width_px"], size["height_px"]) == (640, 480)
    for floor in ("memory_pass", "decode_only"):
        assert _positive(size["floors"][floor]["median_ms"])
    assert set(size["stages"]) == set(speed.STAGES)
    for name, figures in size["stages"].items():
        # a stage may be missing from an older package, but never crash
        assert "error" not in figures, f"{name}: {figures.get('error')}"
        if figures["available"]:
            for key in ("median_ms", "min_ms", "memory_ratio", "decode_ratio"):
                assert _positive(figures[key]), (name, key, figures[key])
            assert figures["repeats"] >= 1
    # these need only frames.py and lines.py, which every version has
    for name in ("decode", "stack", "linearise"):
        assert size["stages"][name]["available"]


def test_quick_batch_measures_throughput_and_memory(quick_run):
    result = json.loads(quick_run[1])
    batch = result["batch"]
    assert batch["frames"] == 30
    if batch["available"]:
        assert batch["frames_decoded"] == batch["frames_reduced"] == 30
        for key in ("decode_only_fps", "each_fps", "ratio"):
            assert _positive(batch[key])
        memory = batch["memory"]
        assert memory["to_frame"] == 30 and memory["from_frame"] == 10
        for key in ("rss_growth_mb", "traced_growth_mb", "traced_peak_above_start_mb"):
            assert math.isfinite(memory[key])


def test_targets_are_reported_not_asserted(quick_run):
    result = json.loads(quick_run[1])
    assert set(result["targets"]) == set(speed.TARGETS)
    for check in result["targets"].values():
        assert check["target"] > 0
        assert check["met"] in (True, False, None)
        if check["measured"] is not None:
            assert _positive(check["measured"])


def test_out_file_matches_stdout_and_is_not_overwritten(quick_run, capsys):
    _, text, out = quick_run
    assert json.loads(out.read_text()) == json.loads(text)
    before = out.read_text()
    code = main(["benchmark", "--quick", "--out", str(out)])
    assert code == 2
    assert "already exists" in capsys.readouterr().err
    assert out.read_text() == before


def test_table_names_every_stage_and_floor(quick_run):
    table = speed.format_report(json.loads(quick_run[1]))
    for word in ("memory pass", "decode only", *speed.STAGES, "targets:", "machine:"):
        assert word in table


@pytest.mark.parametrize("text", ["12x3", "1280", "axb", "1280x720,640"])
def test_bad_sizes_are_one_line_errors(text, capsys):
    assert main(["benchmark", "--sizes", text]) == 2
    err = capsys.readouterr().err.strip()
    assert err.count("\n") == 0 and "WIDTHxHEIGHT" in err


def test_sizes_parse():
    assert benchmark_cli.parse_sizes("640x480, 1920X1080") == ((640, 480), (1920, 1080))


def test_missing_benchmark_module_is_a_clear_message(monkeypatch, capsys):
    monkeypatch.setitem(benchmark_cli.BENCHMARKS, "accuracy", "no_such_benchmark_module")
    assert main(["benchmark", "accuracy", "--quick"]) == 2
    err = capsys.readouterr().err.strip()
    assert err.count("\n") == 0 and "not in this version" in err


def test_unknown_stage_is_refused():
    from benchspec.errors import InputError

    with pytest.raises(InputError, match="unknown benchmark stage"):
        speed.run(quick=True, stages=("decode", "warp"))

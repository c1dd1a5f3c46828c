"""The command line: exit codes, one-line errors, JSON purity, atomic writing, progress."""

from __future__ import annotations

import io
import json
import os
import subprocess
import sys
from pathlib import Path
from typing import Any

import pytest
from rich.console import Console
from toothcomb.cli import main as cli_main
from toothcomb.cli import output
from toothcomb.cli.main import main
from toothcomb.cli.output import dumps_json, to_plain, write_atomic, write_json
from toothcomb.cli.progress import StageProgress, progress_for
from toothcomb.decoders import describe as describe_mod
from toothcomb.decoders import pipeline
from toothcomb.decoders.errors import CaptureError, DecodeError, UsageError
from toothcomb.decoders.options import DecodeOptions

try:
    from test_report import _compared, make_description, make_result
except ImportError:  # tests collected as a package
    from tests.test_report import _compared, make_description, make_result


class FakeDecoder:
    """Stands in for the pipeline: records the call and returns a fixed result or raises."""

    def __init__(self, result: Any = None, error: BaseException | None = None) -> None:
        self.result = make_result() if result is None else result
        self.error = error
        self.calls: list[tuple[str, DecodeOptions, Any]] = []

    def __call__(self, path: str, options: DecodeOptions, progress: Any = None) -> Any:
        self.calls.append((path, options, progress))
        if self.error is not None:
            raise self.error
        return self.result


@pytest.fixture
def capture(tmp_path: Path) -> Path:
    """An existing file to name as the capture (the decoder itself is replaced)."""
    path = tmp_path / "run.wav"
    path.write_bytes(b"RIFF")
    return path


@pytest.fixture
def fake(monkeypatch: pytest.MonkeyPatch) -> FakeDecoder:
    decoder = FakeDecoder()
    monkeypatch.setattr(pipeline, "decode_capture", decoder)
    return decoder


# --------------------------------------------------------------------------- help and usage


def test_help_exits_0_and_documents_exit_codes(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["--help"]) == 0
    out = capsys.readouterr().out
    assert "decode" in out and "describe" in out and "simulate" in out
    assert "3    could not decode" in out
    assert "130  interrupted" in out


@pytest.mark.parametrize("command", ["decode", "describe", "demo", "simulate", "version"])
def test_every_command_has_help(command: str, capsys: pytest.CaptureFixture[str]) -> None:
    assert main([command, "--help"]) == 0
    out = capsys.readouterr().out
    assert out.startswith(f"usage: toothcomb {command}")


def test_decode_help_shows_the_fixed_options_and_examples(
    capsys: pytest.CaptureFixture[str],
) -> None:
    main(["decode", "--help"])
    out = capsys.readouterr().out
    for option in ("--crank CH", "--cam CH", "--wheel N-M", "--json PATH|-", "--plot PATH"):
        assert option in out
    assert "toothcomb decode scope.csv --crank CH1 --cam CH2 --cam CH3 --wheel 36-1" in out


@pytest.mark.parametrize(
    "argv",
    [
        [],
        ["decode"],
        ["frobnicate"],
        ["decode", "x.wav", "--crank-sensor", "optical"],
        ["decode", "x.wav", "--sample-rate", "fast"],
        ["decode", "x.wav", "--sample-rate", "-48000"],
        ["decode", "x.wav", "--block-size", "0"],
        ["decode", "x.wav", "--width", "10"],
    ],
)
def test_bad_usage_exits_2(argv: list[str], capsys: pytest.CaptureFixture[str]) -> None:
    assert main(argv) == 2
    err = capsys.readouterr().err
    assert "error:" in err
    assert "Traceback" not in err


def test_version_and_dash_dash_version(capsys: pytest.CaptureFixture[str]) -> None:
    from importlib.metadata import version

    assert main(["version"]) == 0
    assert capsys.readouterr().out == f"toothcomb {version('toothcomb')}\n"
    assert main(["--version"]) == 0
    assert capsys.readouterr().out == f"toothcomb {version('toothcomb')}\n"


# --------------------------------------------------------------------------- errors


def _one_line(err: str) -> str:
    lines = err.splitlines()
    assert len(lines) == 1, err
    assert lines[0].startswith("toothcomb: ")
    return lines[0]


def test_missing_capture_is_one_line_exit_2(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    missing = tmp_path / "no such capture.flac"
    assert main(["decode", str(missing)]) == 2
    captured = capsys.readouterr()
    line = _one_line(captured.err)
    assert repr(str(missing)) in line
    assert "does not exist" in line
    assert captured.out == ""


def test_missing_capture_for_describe(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["describe", str(tmp_path / "gone.csv")]) == 2
    assert "gone.csv" in _one_line(capsys.readouterr().err)


def test_dataset_inside_an_existing_file_is_not_called_missing(
    tmp_path: Path, fake: FakeDecoder, capsys: pytest.CaptureFixture[str]
) -> None:
    h5 = tmp_path / "run.h5"
    h5.write_bytes(b"\x89HDF")
    assert main(["decode", f"{h5}:/scope/ch", "--quiet"]) == 0
    assert fake.calls[0][0] == f"{h5}:/scope/ch"


@pytest.mark.parametrize(
    ("error", "code"),
    [
        (DecodeError("no crank sync in 'run.wav': no gap was found in 2000 teeth"), 3),
        (CaptureError("run.wav: the RIFF header is cut short"), 2),
        (UsageError("channel 'cam9' is not in run.wav (it has 0=a, 1=b)"), 2),
    ],
)
def test_library_errors_become_one_line_and_their_exit_code(
    capture: Path,
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
    error: Exception,
    code: int,
) -> None:
    monkeypatch.setattr(pipeline, "decode_capture", FakeDecoder(error=error))
    assert main(["decode", str(capture)]) == code
    assert _one_line(capsys.readouterr().err) == f"toothcomb: {error}"


def test_unexpected_exception_is_internal_error_exit_4(
    capture: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    monkeypatch.setattr(pipeline, "decode_capture", FakeDecoder(error=ZeroDivisionError("boom")))
    assert main(["decode", str(capture)]) == 4
    assert _one_line(capsys.readouterr().err) == (
        "toothcomb: internal error: ZeroDivisionError: boom (run with --debug for the traceback)"
    )


@pytest.mark.parametrize("where", ["before", "after"])
def test_debug_shows_the_traceback(
    where: str,
    capture: Path,
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
) -> None:
    monkeypatch.setattr(pipeline, "decode_capture", FakeDecoder(error=ZeroDivisionError("boom")))
    argv = ["decode", str(capture)]
    argv = ["--debug", *argv] if where == "before" else [*argv, "--debug"]
    assert main(argv) == 4
    err = capsys.readouterr().err
    assert "Traceback (most recent call last)" in err
    assert err.rstrip().endswith("toothcomb: internal error: ZeroDivisionError: boom")


def test_keyboard_interrupt_exits_130(
    capture: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    monkeypatch.setattr(pipeline, "decode_capture", FakeDecoder(error=KeyboardInterrupt()))
    assert main(["decode", str(capture)]) == 130
    assert _one_line(capsys.readouterr().err) == "toothcomb: interrupted"


def test_multi_line_messages_are_folded_to_one_line(
    capture: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    err = CaptureError("bad header\nin line 3")
    monkeypatch.setattr(pipeline, "decode_capture", FakeDecoder(error=err))
    assert main(["decode", str(capture)]) == 2
    assert _one_line(capsys.readouterr().err) == "toothcomb: bad header in line 3"


# --------------------------------------------------------------------------- decode


def test_options_reach_the_library(
    capture: Path, fake: FakeDecoder, capsys: pytest.CaptureFixture[str]
) -> None:
    argv = ["decode", str(capture), "--crank", "1", "--cam", "2", "--cam", "cam_ex"]
    argv += ["--wheel", "36-1", "--crank-sensor", "vr", "--cam-sensor", "hall"]
    argv += ["--sample-rate", "48000", "--block-size", "4096", "--quiet"]
    assert main(argv) == 0
    path, options, progress = fake.calls[0]
    assert path == str(capture)
    assert options == DecodeOptions(
        crank="1",
        cams=("2", "cam_ex"),
        wheel="36-1",
        crank_sensor="vr",
        cam_sensor="hall",
        sample_rate=48000.0,
        block_size=4096,
    )
    # stderr is not a terminal here, so no progress bar is drawn
    assert progress is None
    assert capsys.readouterr().out == ""


def test_report_goes_to_stdout_by_default(
    capture: Path, fake: FakeDecoder, capsys: pytest.CaptureFixture[str]
) -> None:
    assert main(["decode", str(capture), "--width", "100"]) == 0
    captured = capsys.readouterr()
    assert "60-2  (60 positions, 2 missing, pitch 6.00° CA)" in captured.out
    assert "REVERSED" in captured.out
    assert max(len(line) for line in captured.out.splitlines()) <= 100
    assert captured.err == ""


def test_json_to_stdout_is_pure_json(
    capture: Path, fake: FakeDecoder, capsys: pytest.CaptureFixture[str]
) -> None:
    assert main(["decode", str(capture), "--json", "-", "--width", "100"]) == 0
    captured = capsys.readouterr()
    data = json.loads(captured.out)  # fails on anything but one JSON document
    assert data == to_plain(fake.result.to_json())
    assert data["crank"]["wheel"] == "60-2"
    assert data["crank"]["polarity"] == "reversed"
    assert data["cams"][0]["edges"][0]["angle_deg"]["mean"] == pytest.approx(112.3456)
    # the report moved to stderr
    assert "Crank - channel crank" in captured.err


def test_json_to_stdout_with_quiet_prints_nothing_else(
    capture: Path, fake: FakeDecoder, capsys: pytest.CaptureFixture[str]
) -> None:
    assert main(["decode", str(capture), "--json", "-", "--quiet"]) == 0
    captured = capsys.readouterr()
    assert json.loads(captured.out)["capture"]["channels"] == ["crank", "cam_in", "cam_ex"]
    assert captured.err == ""


def test_nan_in_the_result_is_null_in_the_json(
    capture: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    monkeypatch.setattr(
        pipeline, "decode_capture", FakeDecoder(result=make_result(lead_std=float("nan")))
    )
    assert main(["decode", str(capture), "--json", "-", "--quiet"]) == 0
    out = capsys.readouterr().out
    assert "NaN" not in out
    assert json.loads(out)["cams"][0]["edges"][0]["angle_deg"]["std"] is None


def test_json_file_is_written_whole_and_reported(
    capture: Path, fake: FakeDecoder, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    target = tmp_path / "out" / "result.json"
    target.parent.mkdir()
    target.write_text("x" * 100_000)  # an older, longer file is replaced, not overwritten
    argv = ["decode", str(capture), "--json", str(target), "--width", "100"]
    assert main(argv) == 2  # not without --force
    assert target.read_text() == "x" * 100_000
    capsys.readouterr()
    assert main([*argv, "--force"]) == 0
    data = json.loads(target.read_text())
    assert data["crank"]["revolutions"] == 53
    assert sorted(p.name for p in target.parent.iterdir()) == ["result.json"]
    out = capsys.readouterr().out
    assert f"JSON written to {target}" in " ".join(out.split())
    assert "Crank - channel crank" in out
    # the safety caution stays the last thing printed
    assert out.rstrip().splitlines()[-2].startswith("Caution:")


def test_json_into_a_missing_folder_fails_before_decoding(
    capture: Path, fake: FakeDecoder, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    target = tmp_path / "nowhere" / "r.json"
    assert main(["decode", str(capture), "--json", str(target)]) == 2
    line = _one_line(capsys.readouterr().err)
    assert "does not exist" in line and "nowhere" in line
    assert fake.calls == []


def test_mark_out_of_tolerance_exits_1(
    capture: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    monkeypatch.setattr(
        pipeline, "decode_capture", FakeDecoder(result=_compared("off-by-teeth", 1))
    )
    assert main(["decode", str(capture), "--quiet"]) == 1
    monkeypatch.setattr(pipeline, "decode_capture", FakeDecoder(result=_compared("in-time")))
    assert main(["decode", str(capture), "--quiet"]) == 0


def test_console_script_runs_as_a_module(tmp_path: Path) -> None:
    proc = subprocess.run(
        [sys.executable, "-m", "toothcomb.cli", "--help"],
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert proc.returncode == 0
    assert proc.stdout.startswith("usage: toothcomb")
    proc = subprocess.run(
        [sys.executable, "-m", "toothcomb.cli", "decode", str(tmp_path / "missing.wav")],
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert proc.returncode == 2
    assert proc.stdout == ""
    assert proc.stderr.count("\n") == 1
    assert "missing.wav" in proc.stderr and "Traceback" not in proc.stderr


# --------------------------------------------------------------------------- describe


def test_describe_report_and_json(
    capture: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    calls: list[tuple[str, dict[str, Any]]] = []

    def fake_describe(path: str, **kw: Any) -> Any:
        calls.append((path, kw))
        return make_description()

    monkeypatch.setattr(describe_mod, "describe_capture", fake_describe)
    argv = ["describe", str(capture), "--sample-rate", "96000", "--json", "-", "--width", "100"]
    assert main(argv) == 0
    captured = capsys.readouterr()
    data = json.loads(captured.out)
    assert [c["guess"]["role"] for c in data["channels"]] == ["crank", "cam"]
    assert calls[0][0] == str(capture)
    assert calls[0][1]["sample_rate"] == 96000.0
    assert "square wave with a regular gap" in captured.err
    assert "Caution:" in captured.err


# --------------------------------------------------------------------------- demo


def test_demo_decodes_the_shipped_capture_from_the_current_folder(
    tmp_path: Path,
    fake: FakeDecoder,
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
) -> None:
    shipped = tmp_path / "captures" / cli_main.DEMO_CAPTURE
    shipped.parent.mkdir()
    shipped.write_bytes(b"fLaC")
    monkeypatch.chdir(tmp_path)
    assert cli_main.find_demo_capture() == shipped
    assert main(["demo", "--width", "100"]) == 0
    assert fake.calls[0][0] == str(shipped)
    out = " ".join(capsys.readouterr().out.split())
    assert f"demo: decoding the shipped capture {shipped}" in out


# --------------------------------------------------------------------------- output helpers


def _random_json(rng: Any, depth: int = 0) -> Any:
    """A random value of plain JSON types, as results hold them: numbers, lists of numbers and
    of pairs, strings with escapes and non-ASCII letters, empty containers, NaN and infinity
    (which become null), numpy arrays."""
    import numpy as np

    kind = int(rng.integers(0, 12 if depth < 4 else 6))
    if kind == 0:
        return float(rng.normal() * 10.0 ** rng.integers(-12, 12))
    if kind == 1:
        return int(rng.integers(-10**12, 10**12))
    if kind == 2:
        return [None, True, False, -0.0, float("nan"), float("inf"), 5e-324][rng.integers(0, 7)]
    if kind == 3:
        return "".join(rng.choice(list('ab"\\\n\té°ω 1/'), int(rng.integers(0, 8))))
    if kind == 4:
        return [float(x) for x in rng.normal(size=int(rng.integers(0, 6)))]
    if kind == 5:
        return np.round(rng.normal(size=int(rng.integers(0, 5))), 3)
    if kind in (6, 7):
        n = int(rng.integers(0, 5))
        return [[float(a), float(b)] for a, b in rng.normal(size=(n, 2))]
    if kind in (8, 9):
        return {f"k{i}": _random_json(rng, depth + 1) for i in range(int(rng.integers(0, 4)))}
    return [_random_json(rng, depth + 1) for _ in range(int(rng.integers(0, 4)))]


@pytest.mark.parametrize("indent", [2, 4, 0])
def test_indented_json_is_the_standard_librarys_text(indent: int) -> None:
    """The indented JSON is written by toothcomb's own writer for speed; it must be the very
    text the standard library writes, byte for byte, for any value a result can hold.
    # source: Python's json module (json.dumps with indent, ensure_ascii=False)"""
    import numpy as np

    rng = np.random.default_rng(1987)
    for trial in range(400):
        value = _random_json(rng)
        want = json.dumps(to_plain(value), indent=indent, allow_nan=False, ensure_ascii=False)
        assert dumps_json(value, indent=indent) == want + "\n", trial
    # and a real result: reference times, events, the speed trace
    result = {"reference_times_s": np.arange(2000) / 13.3, "events": [(0.1, 30.5)] * 500,
              "trace": tuple((0.004 * i, 800.0 + i % 7) for i in range(3000))}
    want = json.dumps(to_plain(result), indent=indent, allow_nan=False, ensure_ascii=False)
    assert dumps_json(result, indent=indent) == want + "\n"


def test_to_plain_handles_numpy_and_non_finite() -> None:
    import numpy as np

    data = {
        "a": np.float64(1.5),
        "b": np.int32(3),
        "c": (float("nan"), float("-inf"), 2.0),
        "d": np.array([1.0, np.nan]),
        "e": np.bool_(True),
        1: "key",
    }
    assert to_plain(data) == {
        "a": 1.5,
        "b": 3,
        "c": [None, None, 2.0],
        "d": [1.0, None],
        "e": True,
        "1": "key",
    }
    assert to_plain([]) == []
    with pytest.raises(TypeError, match="cannot write a object as JSON"):
        to_plain(object())


def test_dumps_json_is_strict_json() -> None:
    text = dumps_json({"x": float("nan"), "name": "Vr°"}, indent=None)
    assert text == '{"x": null, "name": "Vr°"}\n'
    # source: Python docs, json module: parse_constant is called for 'NaN', 'Infinity' and
    # '-Infinity', which RFC 8259 does not allow
    json.loads(text, parse_constant=lambda c: pytest.fail(f"non-standard constant {c}"))


def test_write_atomic_leaves_no_temp_file_on_failure(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    target = tmp_path / "r.json"
    target.write_text("old")

    def refuse(src: Any, dst: Any) -> None:
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(output.os, "replace", refuse)
    with pytest.raises(UsageError, match="No space left on device"):
        write_atomic(target, "new")
    assert target.read_text() == "old"
    assert [p.name for p in tmp_path.iterdir()] == ["r.json"]


def test_write_atomic_keeps_the_mode_of_an_existing_file(tmp_path: Path) -> None:
    target = tmp_path / "r.json"
    target.write_text("old")
    os.chmod(target, 0o640)
    write_atomic(target, b"new")
    assert target.read_bytes() == b"new"
    assert target.stat().st_mode & 0o777 == 0o640


def test_write_atomic_new_file_follows_the_umask(tmp_path: Path) -> None:
    old = os.umask(0o022)
    try:
        write_atomic(tmp_path / "n.json", "{}")
    finally:
        os.umask(old)
    # mkstemp creates 0600; the written file must look like one made by open(): 0666 & ~umask
    # source: Python docs, tempfile.mkstemp ("readable and writable only by the creating user")
    assert (tmp_path / "n.json").stat().st_mode & 0o777 == 0o644


@pytest.mark.parametrize("kind", ["folder", "missing-parent"])
def test_write_atomic_bad_targets(tmp_path: Path, kind: str) -> None:
    target = tmp_path if kind == "folder" else tmp_path / "a" / "b.json"
    with pytest.raises(UsageError, match="folder"):
        write_atomic(target, "x", what="JSON file")


def test_write_json_to_stdout_stream() -> None:
    buf = io.StringIO()
    write_json({"rpm": [800.0, float("nan")]}, "-", stdout=buf)
    assert json.loads(buf.getvalue()) == {"rpm": [800.0, None]}


# --------------------------------------------------------------------------- progress


def test_progress_only_on_a_terminal() -> None:
    with progress_for(Console(file=io.StringIO()), enabled=True) as cb:
        assert cb is None
    term = Console(file=io.StringIO(), force_terminal=True, width=80)
    with progress_for(term, enabled=False) as cb:
        assert cb is None
    with progress_for(term, enabled=True) as cb:
        assert isinstance(cb, StageProgress)


def test_stage_progress_tracks_each_stage() -> None:
    buf = io.StringIO()
    with StageProgress(Console(file=buf, force_terminal=True, width=80)) as bar:
        bar("levels", 3, 10)
        bar("decode", 0, 0)  # unknown total
        bar("levels", 10, 10)
        bar("decode", 7, 0)
        assert bar.completed("levels") == 10.0
        assert bar.completed("decode") == 7.0
    assert "levels" in buf.getvalue()


def test_decode_hands_a_progress_bar_to_the_library_on_a_terminal(
    capture: Path, fake: FakeDecoder, monkeypatch: pytest.MonkeyPatch
) -> None:
    term = Console(file=io.StringIO(), force_terminal=True, width=80)
    monkeypatch.setattr(cli_main, "_progress_console", lambda streams: term)
    assert main(["decode", str(capture), "--json", "-"]) == 0
    assert isinstance(fake.calls[0][2], StageProgress)
    fake.calls.clear()
    assert main(["decode", str(capture), "--json", "-", "--quiet"]) == 0
    assert fake.calls[0][2] is None


def test_result_json_keeps_the_design_field_names() -> None:
    # fields fixed by DESIGN.md, read by independent checks
    data = to_plain(make_result().to_json())
    assert set(data["capture"]) >= {"path", "sample_rate", "duration_s", "channels"}
    assert set(data["crank"]) >= {
        "channel",
        "sensor",
        "wheel",
        "polarity",
        "rpm",
        "revolutions",
        "sync_losses",
        "reference_times_s",
    }
    edge = data["cams"][0]["edges"][0]
    assert set(edge) >= {"flank", "direction", "angle_deg", "events"}
    assert edge["events"][0] == [pytest.approx(0.10), pytest.approx(112.30)]


# --------------------------------------------------------------------------- end to end


def _circ_diff(a: float, b: float) -> float:
    return (a - b + 180.0) % 360.0 - 180.0


def test_simulate_then_decode_end_to_end(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    capture = tmp_path / "idle.flac"
    truth_path = tmp_path / "idle.truth.json"
    argv = ["simulate", "--preset", cli_main.DEMO_PRESET, str(capture)]
    argv += ["--truth", str(truth_path), "--duration", "1.0"]
    assert main(argv) == 0
    assert f"wrote {capture} from preset" in capsys.readouterr().err
    truth = json.loads(truth_path.read_text())

    out = tmp_path / "idle.json"
    assert main(["decode", str(capture), "--json", str(out), "--quiet"]) == 0
    result = json.loads(out.read_text())
    assert result["crank"]["wheel"] == truth["crank"]["wheel"] == "60-2"
    assert result["crank"]["sensor"] == truth["crank"]["sensor"]
    assert result["capture"]["channels"].index(result["crank"]["channel"]) == 0
    # common practice, no source: mean speed within 3 % of the true one
    assert result["crank"]["rpm"]["mean"] == pytest.approx(truth["rpm"]["mean"], rel=0.03)
    (cam,) = result["cams"]
    for want in truth["cams"][0]["edges"]:
        got = [e for e in cam["edges"] if e["direction"] == want["direction"]]
        assert len(got) == 1
        # common practice, no source: a tenth of the usual +-3 deg CA timing tolerance
        assert abs(_circ_diff(got[0]["angle_deg"]["mean"], want["angle_after_ref_deg"])) < 0.3


def test_decode_of_a_file_that_is_not_a_capture_is_one_line_exit_2(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    bogus = tmp_path / "notes.wav"
    bogus.write_text("this is not a sound file\n")
    assert main(["decode", str(bogus)]) == 2
    captured = capsys.readouterr()
    assert "notes.wav" in _one_line(captured.err)
    assert captured.out == ""


def test_simulate_usage_errors(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["simulate", "--preset", cli_main.DEMO_PRESET]) == 2
    assert "exactly one output file, not 0" in _one_line(capsys.readouterr().err)
    assert main(["simulate", str(tmp_path / "s.json")]) == 2
    assert "a scenario file and an output file, got 1" in _one_line(capsys.readouterr().err)
    bad = tmp_path / "bad.json"
    bad.write_text("{ not json")
    assert main(["simulate", str(bad), str(tmp_path / "o.wav")]) == 2
    assert "is not valid JSON (line 1, column 3" in _one_line(capsys.readouterr().err)
    assert main(["simulate", str(tmp_path / "none.json"), str(tmp_path / "o.wav")]) == 2
    assert "does not exist" in _one_line(capsys.readouterr().err)
    assert main(["simulate", "--preset", "no-such-preset", str(tmp_path / "o.wav")]) == 2
    assert "no-such-preset" in _one_line(capsys.readouterr().err)
    assert not (tmp_path / "o.wav").exists()


def test_simulate_list_names_every_preset(capsys: pytest.CaptureFixture[str]) -> None:
    from toothcomb.decoders.simulate import PRESETS

    assert main(["simulate", "--list"]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert [line.split()[0] for line in lines] == sorted(PRESETS)
    assert cli_main.DEMO_PRESET in PRESETS


def test_demo_simulates_when_no_capture_is_shipped(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    from toothcomb.decoders import simulate

    real_preset = simulate.preset
    monkeypatch.setattr(cli_main, "find_demo_capture", lambda cwd=None: None)
    monkeypatch.setattr(simulate, "preset", lambda name: real_preset(name, duration_s=0.6))
    assert main(["demo", "--json", "-", "--width", "100"]) == 0
    captured = capsys.readouterr()
    data = json.loads(captured.out)
    assert data["crank"]["wheel"] == "60-2"
    assert data["capture"]["duration_s"] == pytest.approx(0.6)
    note = " ".join(captured.err.split())
    assert "was simulated into" in note and cli_main.DEMO_PRESET in note


class ClosedPipe(io.StringIO):
    """A stdout whose reader has gone away."""

    def write(self, text: str) -> int:
        raise BrokenPipeError(32, "Broken pipe")


@pytest.mark.parametrize("json_to", [None, "-"])
def test_closed_stdout_ends_quietly_with_141(
    json_to: str | None,
    capture: Path,
    fake: FakeDecoder,
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
) -> None:
    monkeypatch.setattr(sys, "stdout", ClosedPipe())
    argv = ["decode", str(capture)] + (["--json", json_to] if json_to else [])
    # 128 + SIGPIPE (13), the status a shell reports for a process ended by a closed pipe
    # source: GNU Bash manual, 3.7.5 Exit Status ("128+N" for fatal signal N); signal(7): SIGPIPE 13
    assert main(argv) == 141
    assert "internal error" not in capsys.readouterr().err


def test_simulate_from_a_scenario_file(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    scenario = tmp_path / "s.json"
    scenario.write_text(json.dumps({"duration_s": 0.2, "speed": {"kind": "constant", "rpm": 1200}}))
    out, truth = tmp_path / "s.csv", tmp_path / "s.truth.json"
    argv = ["simulate", str(scenario), str(out), "--truth", str(truth), "--seed", "5"]
    assert main(argv) == 0
    assert (
        capsys.readouterr().err == f"wrote {out} from scenario {scenario}, true answer in {truth}\n"
    )
    answer = json.loads(truth.read_text())
    assert answer["crank"]["wheel"] == "60-2"
    assert answer["seed"] == 5
    assert answer["duration_s"] == pytest.approx(0.2)
    assert out.stat().st_size > 0
    # a scenario field the simulator does not know is a usage error naming it
    scenario.write_text(json.dumps({"duration_s": 0.2, "colour": "red"}))
    assert main(["simulate", str(scenario), str(out), "--force"]) == 2
    assert "colour" in _one_line(capsys.readouterr().err)

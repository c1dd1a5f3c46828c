"""Many captures at once: finding them, one row each, bad files as error rows, the same answer on
local worker processes and on Dask, and the ``toothcomb batch`` command's files and exit codes."""

from __future__ import annotations

import csv
import json
import sys
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import Any

import pytest
from toothcomb.cli.main import main
from toothcomb.cli.output import dumps_json
from toothcomb.decoders import batch as batch_mod
from toothcomb.decoders.batch import (
    BASE_COLUMNS,
    EXIT_SOME_FAILED,
    BatchOptions,
    BatchResult,
    capture_suffixes,
    dask_executor,
    decode_many,
    find_captures,
    local_executor,
    result_names,
)
from toothcomb.decoders.errors import UsageError
from toothcomb.decoders.options import DecodeOptions
from toothcomb.decoders.pipeline import decode_capture
from toothcomb.decoders.simulate import preset, write_scenario
from toothcomb.decoders.verdict import compare

#: the good captures of the test fleet: file name -> (preset, length in s)
GOOD: dict[str, tuple[str, float]] = {
    "belt.h5": ("belt-jumped-scope", 0.4),
    "idle.flac": ("idle-60-2-vr-soundcard", 1.5),
    "scope.csv": ("hall-36-1-two-cams-scope", 0.3),
}
BAD = ("corrupt.wav", "empty.flac")


@pytest.fixture(scope="module")
def fleet(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    """A folder with three short simulated captures, a corrupt and an empty file, a note that is
    no capture, and each good capture's truth."""
    folder = tmp_path_factory.mktemp("fleet")
    truths = {}
    for name, (scenario, seconds) in GOOD.items():
        truths[name] = write_scenario(preset(scenario, duration_s=seconds), folder / name)
    (folder / "corrupt.wav").write_bytes(b"this is no sound file\x00\x01\x02" * 8)
    (folder / "empty.flac").write_bytes(b"")
    (folder / "notes.md").write_text("not a capture\n")
    return {"folder": folder, "truth": truths}


@pytest.fixture(scope="module")
def captures(fleet: dict[str, Any]) -> list[str]:
    return find_captures([fleet["folder"]])


@pytest.fixture(scope="module")
def direct(fleet: dict[str, Any]) -> dict[str, Any]:
    """Each good capture decoded on its own, in this process, as ``toothcomb decode`` does."""
    return {name: decode_capture(str(fleet["folder"] / name)) for name in GOOD}


@pytest.fixture(scope="module")
def local_batch(captures: list[str]) -> BatchResult:
    with local_executor(2) as pool:
        return decode_many(captures, BatchOptions(), pool)


@pytest.fixture(scope="module")
def dask_batch(captures: list[str]) -> BatchResult:
    """The same batch on Dask's local cluster (in this process, two worker threads), closed
    before the result is handed on."""
    distributed = pytest.importorskip("dask.distributed")
    with (
        distributed.LocalCluster(
            n_workers=1, threads_per_worker=2, processes=False, dashboard_address=None
        ) as cluster,
        distributed.Client(cluster) as client,
        dask_executor(client) as executor,
    ):
        result = decode_many(captures, BatchOptions(), executor)
    # distributed keeps a thread for its off-loaded work once it has run any; the tests after
    # this one fork decode workers, which they may only do with no other thread running
    utils = sys.modules.get("distributed.utils")
    offload = getattr(utils, "_offload_executor", None)
    if isinstance(offload, ThreadPoolExecutor):
        offload.shutdown(wait=True)
        utils._offload_executor = ThreadPoolExecutor(  # type: ignore[union-attr]
            max_workers=1, thread_name_prefix="Dask-Offload"
        )
    return result


def _name(path: str) -> str:
    return Path(path).name


# --------------------------------------------------------------------------- finding captures


def test_captures_are_found_by_the_readers_suffixes_in_a_fixed_order(
    fleet: dict[str, Any], captures: list[str]
) -> None:
    assert [_name(c) for c in captures] == sorted([*GOOD, *BAD])  # notes.md is no capture
    folder = fleet["folder"]
    again = find_captures([folder / "idle.flac", folder, str(folder / "idle.flac")])
    assert [_name(c) for c in again] == [
        "idle.flac",
        "belt.h5",
        "corrupt.wav",
        "empty.flac",
        "scope.csv",
    ]
    assert {".csv", ".flac", ".h5", ".wav"} <= set(capture_suffixes())


def test_nothing_to_decode_is_a_usage_error(tmp_path: Path) -> None:
    with pytest.raises(UsageError) as missing:
        find_captures([tmp_path / "no-such-folder"])
    assert missing.value.exit_code == 2 and "does not exist" in str(missing.value)
    (tmp_path / "readme.md").write_text("x")
    with pytest.raises(UsageError) as empty:
        find_captures([tmp_path])
    assert "no captures found" in str(empty.value) and ".flac" in str(empty.value)
    # a listed file that is missing is kept: its decode says what is wrong, in its own row
    assert find_captures([tmp_path / "gone.wav"], check_exists=False) == [
        str(tmp_path / "gone.wav")
    ]


def test_result_names_never_clash_nor_take_the_summary() -> None:
    names = result_names(["a/Run.wav", "b/run.flac", "c/run.csv", "summary.h5", "x y.csv"])
    assert names == ["Run.json", "run-2.json", "run-3.json", "summary-2.json", "x_y.json"]
    assert len({n.lower() for n in names}) == len(names)


# --------------------------------------------------------------------------- rows


def test_rows_come_in_the_order_of_the_list(local_batch: BatchResult, captures) -> None:
    assert [r.file for r in local_batch.rows] == captures
    assert [r.result_file for r in local_batch.rows] == [
        "belt.json",
        "corrupt.json",
        "empty.json",
        "idle.json",
        "scope.json",
    ]


def test_each_good_row_matches_a_direct_decode(
    local_batch: BatchResult, direct: dict[str, Any], fleet: dict[str, Any]
) -> None:
    rows = {_name(r.file): r for r in local_batch.rows}
    for name, result in direct.items():
        row = rows[name]
        assert (row.status, row.exit_code, row.error) == ("ok", 0, "")
        crank = result.crank
        assert row.wheel == crank.wheel
        assert row.crank_channel == crank.channel and row.crank_sensor == crank.sensor
        assert row.rpm_mean == crank.rpm.mean  # the same decode, to the last bit
        assert row.revolutions == crank.revolutions
        assert row.reference_events == len(crank.reference_times_s)
        assert [c.channel for c in row.cams] == [c.channel for c in result.cams]
        for cam_row, cam in zip(row.cams, result.cams, strict=True):
            assert [e.angle_deg for e in cam_row.edges] == [e.angle.mean for e in cam.edges]
            assert [e.jitter_pp_deg for e in cam_row.edges] == [
                e.jitter.tie_pp_deg if e.jitter else None for e in cam.edges
            ]
            assert [e.flank for e in cam_row.edges] == [e.flank for e in cam.edges]
        # and the decode itself is right: the simulator's wheel, its mean speed within 1 %
        truth = fleet["truth"][name]
        # source: the simulator's truth for the scenario (decoders/simulate/truth.py)
        assert row.wheel == truth["crank"]["wheel"]
        assert row.rpm_mean == pytest.approx(truth["rpm"]["mean"], rel=0.01)
    # the per-capture result is the whole decode
    results = {
        _name(r.file): res for r, res in zip(local_batch.rows, local_batch.results, strict=True)
    }
    for name, result in direct.items():
        assert dumps_json(results[name]) == dumps_json(result.to_json())


def test_bad_files_are_error_rows_and_do_not_stop_the_batch(local_batch: BatchResult) -> None:
    rows = {_name(r.file): r for r in local_batch.rows}
    for name in BAD:
        row = rows[name]
        assert (row.status, row.exit_code) == ("error", 2)
        assert row.error and "\n" not in row.error and name in row.error
        assert row.wheel is None and row.cams == ()
    assert "empty" in rows["empty.flac"].error
    assert (local_batch.decoded, local_batch.failed) == (3, 2)
    assert local_batch.exit_code == EXIT_SOME_FAILED
    error_json = local_batch.results[
        [r.file for r in local_batch.rows].index(rows["corrupt.wav"].file)
    ]
    assert error_json["error"] == {"exit_code": 2, "message": rows["corrupt.wav"].error}


def test_local_and_dask_give_identical_summaries(
    local_batch: BatchResult, dask_batch: BatchResult
) -> None:
    assert dask_batch.rows == local_batch.rows
    assert dumps_json(dask_batch.to_json()) == dumps_json(local_batch.to_json())
    assert dask_batch.to_csv() == local_batch.to_csv()
    assert [dumps_json(r) for r in dask_batch.results] == [
        dumps_json(r) for r in local_batch.results
    ]


def test_a_worker_that_fails_becomes_an_internal_error_row(
    captures: list[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    real = batch_mod.decode_one

    def flaky(path: str, options: BatchOptions):
        if path.endswith("idle.flac"):
            raise MemoryError("worker ran out of memory")
        return real(path, options)

    monkeypatch.setattr(batch_mod, "decode_one", flaky)
    with ThreadPoolExecutor(2) as pool:
        result = decode_many(captures, BatchOptions(), pool, keep_results=False)
    row = next(r for r in result.rows if r.file.endswith("idle.flac"))
    assert (row.status, row.exit_code) == ("error", 4)
    assert row.error == "internal error: MemoryError: worker ran out of memory"
    assert result.failed == 3 and result.results == ()


def test_options_reach_every_capture(captures: list[str], local_batch: BatchResult) -> None:
    """A wheel hint is applied to each capture: a 60-2 capture held to a 36-1 hint is refused
    the way ``toothcomb decode --wheel 36-1`` refuses it (exit 3, the wheel named)."""
    opts = BatchOptions(decode=DecodeOptions(wheel="36-1"))
    with ThreadPoolExecutor(2) as pool:
        result = decode_many(captures[:1], opts, pool, keep_results=False)
    assert _name(result.rows[0].file) == "belt.h5"
    assert local_batch.rows[0].wheel == "60-2"
    row = result.rows[0]
    assert (row.status, row.exit_code) == ("error", 3)
    assert "does not follow the 36-1 wheel" in row.error


# --------------------------------------------------------------------------- the command


def test_batch_command_writes_summary_and_results(
    fleet: dict[str, Any],
    direct: dict[str, Any],
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
) -> None:
    out = tmp_path / "results"
    code = main(["batch", str(fleet["folder"]), "--out", str(out), "--jobs", "2", "--width", "400"])
    assert code == EXIT_SOME_FAILED
    assert sorted(p.name for p in out.iterdir()) == [
        "belt.json",
        "corrupt.json",
        "empty.json",
        "idle.json",
        "scope.json",
        "summary.csv",
        "summary.json",
    ]
    with (out / "summary.csv").open(newline="", encoding="utf-8") as fh:
        reader = csv.DictReader(fh)
        header = reader.fieldnames or []
        table = list(reader)
    assert header[: len(BASE_COLUMNS)] == list(BASE_COLUMNS)
    assert {
        "cam1_channel",
        "cam1_edge1",
        "cam1_edge1_angle_deg",
        "cam1_edge1_jitter_pp_deg",
        "cam2_channel",
    } <= set(header)
    assert [_name(r["file"]) for r in table] == sorted([*GOOD, *BAD])
    by_name = {_name(r["file"]): r for r in table}
    for name, result in direct.items():
        rec = by_name[name]
        assert (rec["status"], rec["exit_code"], rec["wheel"]) == ("ok", "0", result.crank.wheel)
        assert float(rec["rpm_mean"]) == result.crank.rpm.mean
        assert float(rec["cam1_edge1_angle_deg"]) == result.cams[0].edges[0].angle.mean
        assert json.loads((out / rec["result_file"]).read_text())["crank"]["wheel"] == (
            result.crank.wheel
        )
    for name in BAD:
        assert (by_name[name]["status"], by_name[name]["exit_code"]) == ("error", "2")
        assert by_name[name]["wheel"] == ""
    summary = json.loads((out / "summary.json").read_text())
    assert summary["batch"] == {"captures": 5, "decoded": 3, "failed": 2, "exit_code": 5}
    assert [r["status"] for r in summary["rows"]] == [
        by_name[_name(r["file"])]["status"] for r in summary["rows"]
    ]
    captured = capsys.readouterr()
    assert "5 captures: 3 decoded, 2 failed" in captured.out
    assert "ERROR" in captured.out and "idle.flac" in captured.out
    assert captured.err == ""  # not a terminal: no progress bar


def test_batch_against_a_profile_reports_the_verdict_per_capture(
    fleet: dict[str, Any], tmp_path: Path
) -> None:
    belt = str(fleet["folder"] / "belt.h5")
    out = tmp_path / "verdict"
    # the belt-jumped scenario has its cam belt one tooth late against the demo engine profile
    # source: decoders/simulate/presets.py (jumped_teeth=1) and the shipped demo-belt-60-2-vr
    code = main(
        ["batch", belt, "--out", str(out), "--against", "demo-belt-60-2-vr", "-q", "--jobs", "1"]
    )
    assert code == 1  # every capture decoded, a mark out of tolerance
    expected = compare(decode_capture(belt), "demo-belt-60-2-vr")
    row = json.loads((out / "summary.json").read_text())["rows"][0]
    assert row["verdict"] == expected.verdict.cams[0].status == "off-by-teeth"
    assert row["exit_code"] == 1
    assert row["verdict_sentences"] == list(expected.verdict.sentences)
    edges = expected.cams[0].edges
    assert [e["deviation_deg"] for e in row["cams"][0]["edges"]] == [
        e.comparison.deviation_deg for e in edges
    ]
    with (out / "summary.csv").open(newline="", encoding="utf-8") as fh:
        rec = next(csv.DictReader(fh))
    assert rec["cam1_edge1_status"] == edges[0].comparison.status
    assert json.loads((out / "belt.json").read_text())["verdict"]["in_time"] is False


@pytest.mark.parametrize(
    "argv,words",
    [
        (["batch", "{tmp}/nowhere", "--out", "{tmp}/o"], "does not exist"),
        (["batch", "--out", "{tmp}/o"], "batch needs captures"),
        (["batch", "{fleet}", "--out", "{fleet}/idle.flac"], "is a file"),
        (
            ["batch", "{fleet}", "--out", "{tmp}/o", "--jobs", "2", "--dask", "tcp://h:8786"],
            "--jobs 2 applies to this machine",
        ),
        (["batch", "{fleet}", "--out", "{tmp}/o", "--list", "{tmp}/no-list.txt"], "capture list"),
    ],
)
def test_batch_usage_errors_are_one_line_exit_2(
    argv: list[str],
    words: str,
    fleet: dict[str, Any],
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
) -> None:
    args = [a.format(tmp=tmp_path, fleet=fleet["folder"]) for a in argv]
    assert main(args) == 2
    err = capsys.readouterr().err
    assert len(err.splitlines()) == 1 and err.startswith("toothcomb: ") and words in err
    assert not (tmp_path / "o").exists()  # nothing was written


def test_batch_reads_a_capture_list(fleet: dict[str, Any], tmp_path: Path) -> None:
    listing = tmp_path / "week.txt"
    folder = fleet["folder"]
    listing.write_text(
        f"# two captures and one that is gone\n{folder / 'scope.csv'}\n\n"
        f"{folder / 'gone.wav'}\n{folder / 'belt.h5'}\n"
    )
    out = tmp_path / "o"
    assert main(["batch", "--list", str(listing), "--out", str(out), "-q", "--jobs", "1"]) == 5
    rows = json.loads((out / "summary.json").read_text())["rows"]
    assert [(_name(r["file"]), r["status"], r["exit_code"]) for r in rows] == [
        ("scope.csv", "ok", 0),
        ("gone.wav", "error", 2),
        ("belt.h5", "ok", 0),
    ]


def test_batch_help_documents_the_outputs_and_exit_codes(
    capsys: pytest.CaptureFixture[str],
) -> None:
    assert main(["batch", "--help"]) == 0
    out = capsys.readouterr().out
    assert out.startswith("usage: toothcomb batch")
    for words in (
        "--out DIR",
        "--jobs N",
        "--dask ADDRESS|local",
        "--against REF",
        "--wheel N-M",
        "summary.csv",
        f"{EXIT_SOME_FAILED}    some captures",
    ):
        assert words in out


def test_a_folder_holding_results_is_not_overwritten_without_force(
    fleet: dict[str, Any], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out = tmp_path / "results"
    out.mkdir()
    (out / "summary.json").write_text("{}\n")
    before = (out / "summary.json").read_text()
    code = main(["batch", str(fleet["folder"]), "--out", str(out), "--jobs", "1", "--quiet"])
    assert code == 2
    assert "already holds results (summary.json); give --force" in capsys.readouterr().err
    assert (out / "summary.json").read_text() == before
    code = main(["batch", str(fleet["folder"]), "--out", str(out), "--jobs", "1", "--quiet",
                 "--force"])
    assert code == EXIT_SOME_FAILED
    summary = json.loads((out / "summary.json").read_text())
    assert summary["batch"]["captures"] == len(summary["rows"]) == 5

"""No data loss, and no code run from data.

- Captures are only read: every command that reads one leaves its bytes, size, mode and
  modification time as they were, adds nothing beside it, and opens it read-only.
- Every file toothcomb writes goes to a temporary file that is renamed into place; Ctrl-C in the
  middle of a write leaves the old file (or none) and no temporary file.
- An existing output file is replaced only with ``--force``: toothcomb writes only to the paths
  named on the command line, and a named path that exists is refused (exit 2) without it.
- Profiles are TOML data, never executed; no pickle, ``eval`` or ``exec`` in the package; only
  entry points and modules named in the source are imported.
"""

from __future__ import annotations

import builtins
import contextlib
import hashlib
import io
import json
import os
import re
from functools import cache
from pathlib import Path
from typing import Any

import h5py
import numpy as np
import pytest
import soundfile as sf
from toothcomb.cli import main as cli_main
from toothcomb.cli import output
from toothcomb.cli.main import main
from toothcomb.cli.output import write_atomic
from toothcomb.decoders.errors import UsageError
from toothcomb.decoders.readers import write as capture_write
from toothcomb.decoders.readers.write import write_capture
from toothcomb.decoders.simulate import Instrument, Scenario, simulate

# --------------------------------------------------------------------------- helpers


@cache
def _samples() -> tuple[np.ndarray, float]:
    sc = Scenario(duration_s=0.4, instrument=Instrument(kind="soundcard", sample_rate=48_000.0))
    sim = simulate(sc)
    return sim.samples.copy(), sim.sample_rate


def _capture(folder: Path, fmt: str) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / f"run.{fmt}"
    x, rate = _samples()
    write_capture(path, x, rate, ["crank", "cam"])
    return path


def fingerprint(path: Path) -> tuple[str, int, int, int]:
    """(sha256, size, mtime in ns, mode) of a file."""
    st = path.stat()
    return hashlib.sha256(path.read_bytes()).hexdigest(), st.st_size, st.st_mtime_ns, st.st_mode


def run(argv: list[str]) -> tuple[int, str, str]:
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = main(argv)
    return code, out.getvalue(), err.getvalue()


# --------------------------------------------------------------------------- inputs untouched

#: every command that reads a capture; CAP is the capture, OUT a fresh output folder
READING_COMMANDS: dict[str, list[str]] = {
    "decode": ["decode", "CAP", "--quiet"],
    "decode --json": ["decode", "CAP", "--json", "OUT/r.json", "--quiet"],
    "decode --plot": ["decode", "CAP", "--plot", "OUT/p.png", "--plot-kind", "waveform,speed",
                      "--quiet"],
    "describe --json": ["describe", "CAP", "--json", "OUT/d.json", "--quiet"],
    "learn profile": ["learn", "CAP", "OUT/engine.toml", "--quiet"],
    "learn reference": ["learn", "CAP", "OUT/reference.json", "--quiet"],
    "preview": ["preview", "CAP"],
    "batch": ["batch", "CAP", "--out", "OUT/batch", "--jobs", "1", "--quiet"],
}


@pytest.mark.parametrize("fmt", ["wav", "flac", "csv", "h5"])
@pytest.mark.parametrize("command", list(READING_COMMANDS))
def test_commands_leave_the_capture_as_it_was(tmp_path: Path, command: str, fmt: str) -> None:
    cap = _capture(tmp_path / "in", fmt)
    os.chmod(cap, 0o444)  # as a careful user keeps a capture
    (tmp_path / "out").mkdir()
    before = fingerprint(cap)
    argv = [
        a.replace("CAP", str(cap)).replace("OUT", str(tmp_path / "out"))
        for a in READING_COMMANDS[command]
    ]
    code, _out, err = run(argv)
    assert code in (0, 1), err
    assert fingerprint(cap) == before
    assert sorted(p.name for p in cap.parent.iterdir()) == [cap.name]
    # and the outputs are whole, with no temporary file beside them
    leftovers = [p.name for p in (tmp_path / "out").rglob("*") if p.name.startswith(".")]
    assert leftovers == []


def test_decode_against_a_learned_profile_leaves_both_as_they_were(tmp_path: Path) -> None:
    cap = _capture(tmp_path, "flac")
    profile = tmp_path / "engine.toml"
    assert run(["learn", str(cap), str(profile), "--quiet"])[0] == 0
    before = fingerprint(cap), fingerprint(profile)
    code, _out, err = run(["decode", str(cap), "--against", str(profile), "--quiet"])
    assert code == 0, err
    assert (fingerprint(cap), fingerprint(profile)) == before


@pytest.mark.parametrize("fmt", ["wav", "flac", "csv", "h5"])
def test_the_capture_is_only_ever_opened_for_reading(tmp_path: Path, fmt: str) -> None:
    cap = _capture(tmp_path, fmt)
    seen: list[tuple[str, str]] = []
    real_open, real_os_open = builtins.open, os.open
    real_sf, real_h5 = sf.SoundFile.__init__, h5py.File.__init__

    def is_cap(file: object) -> bool:
        return isinstance(file, (str, os.PathLike)) and os.path.realpath(file) == str(cap)

    def spy_open(file, mode="r", *a, **kw):  # type: ignore[no-untyped-def]
        if is_cap(file):
            seen.append(("open", mode))
        return real_open(file, mode, *a, **kw)

    def spy_os_open(file, flags, *a, **kw):  # type: ignore[no-untyped-def]
        if is_cap(file):
            seen.append(("os.open", "r" if flags & (os.O_WRONLY | os.O_RDWR) == 0 else "w"))
        return real_os_open(file, flags, *a, **kw)

    def spy_sf(self, file, mode="r", *a, **kw):  # type: ignore[no-untyped-def]
        if is_cap(file):
            seen.append(("SoundFile", mode))
        return real_sf(self, file, mode, *a, **kw)

    def spy_h5(self, name, mode="r", *a, **kw):  # type: ignore[no-untyped-def]
        if is_cap(name):
            seen.append(("h5py.File", mode))
        return real_h5(self, name, mode, *a, **kw)

    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(builtins, "open", spy_open)
        mp.setattr(os, "open", spy_os_open)
        mp.setattr(sf.SoundFile, "__init__", spy_sf)
        mp.setattr(h5py.File, "__init__", spy_h5)
        assert run(["decode", str(cap), "--quiet"])[0] == 0
        assert run(["describe", str(cap), "--quiet"])[0] == 0
    assert seen, "the capture was never opened through the functions watched"
    assert {mode for _, mode in seen} <= {"r", "rb"}, seen


# --------------------------------------------------------------------------- interrupted writes


class _HalfThenCtrlC:
    """A file object that writes half of what it is given, then raises KeyboardInterrupt."""

    def __init__(self, fh: Any) -> None:
        self.fh = fh

    def write(self, data: bytes) -> int:
        self.fh.write(data[: len(data) // 2])
        self.fh.flush()
        raise KeyboardInterrupt

    def __getattr__(self, name: str) -> Any:
        return getattr(self.fh, name)

    def __enter__(self) -> _HalfThenCtrlC:
        return self

    def __exit__(self, *exc: object) -> None:
        self.fh.close()


@pytest.fixture
def ctrl_c_mid_write(monkeypatch: pytest.MonkeyPatch) -> list[int]:
    """Make every write_atomic stop with Ctrl-C halfway through its bytes; returns the file
    descriptors of the temporary files it was writing."""
    real = output.os.fdopen
    temps: list[int] = []

    def fdopen(fd: int, *a: Any, **kw: Any) -> _HalfThenCtrlC:
        temps.append(fd)
        return _HalfThenCtrlC(real(fd, *a, **kw))

    monkeypatch.setattr(output.os, "fdopen", fdopen)
    return temps


@pytest.mark.parametrize("old", [None, "old contents\n"])
def test_ctrl_c_halfway_through_write_atomic_leaves_the_old_file(
    tmp_path: Path, ctrl_c_mid_write: list[int], old: str | None
) -> None:
    target = tmp_path / "result.json"
    if old is not None:
        target.write_text(old)
    with pytest.raises(KeyboardInterrupt):
        write_atomic(target, "x" * 10_000)
    assert len(ctrl_c_mid_write) == 1  # a temporary file was being written when it stopped
    if old is None:
        assert not target.exists()
    else:
        assert target.read_text() == old
    assert list(tmp_path.iterdir()) == ([target] if old is not None else [])


@pytest.mark.parametrize(
    ("argv", "name"),
    [
        (["decode", "CAP", "--json", "OUT", "--force", "--quiet"], "r.json"),
        (["describe", "CAP", "--json", "OUT", "--force", "--quiet"], "d.json"),
        (["learn", "CAP", "OUT", "--force", "--quiet"], "engine.toml"),
        (["learn", "CAP", "OUT", "--force", "--quiet"], "reference.json"),
        (["decode", "CAP", "--plot", "OUT", "--plot-kind", "speed", "--force", "--quiet"], "p.png"),
    ],
)
def test_ctrl_c_while_a_command_writes_keeps_the_old_output(
    tmp_path: Path, ctrl_c_mid_write: list[int], argv: list[str], name: str
) -> None:
    cap = _capture(tmp_path / "in", "flac")
    target = tmp_path / name
    target.write_bytes(b"the old output\n")
    argv = [str(cap) if a == "CAP" else str(target) if a == "OUT" else a for a in argv]
    code, _out, err = run(argv)
    assert code == 130, err
    assert err.strip().endswith("toothcomb: interrupted")
    assert ctrl_c_mid_write, "the write was never reached"
    assert target.read_bytes() == b"the old output\n"
    assert sorted(p.name for p in tmp_path.iterdir()) == sorted(["in", name])


@pytest.mark.parametrize("fmt", ["wav", "flac", "csv", "h5"])
def test_ctrl_c_while_simulate_writes_keeps_the_old_capture(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, fmt: str
) -> None:
    old = _capture(tmp_path, fmt)
    before = fingerprint(old)
    real = capture_write.CaptureWriter._write
    calls = {"n": 0}

    def write(self: Any, data: np.ndarray) -> None:
        calls["n"] += 1
        if calls["n"] == 2:  # the second block: the temporary file already holds the first
            real(self, data[: len(data) // 2])
            raise KeyboardInterrupt
        real(self, data)

    monkeypatch.setattr(capture_write.CaptureWriter, "_write", write)
    argv = ["simulate", "--preset", cli_main.DEMO_PRESET, str(old), "--duration", "3", "--force"]
    code, _out, err = run(argv)
    assert code == 130, err
    assert calls["n"] == 2
    assert fingerprint(old) == before
    assert [p.name for p in tmp_path.iterdir()] == [old.name]


# --------------------------------------------------------------------------- --force


def _existing(tmp_path: Path, name: str) -> Path:
    path = tmp_path / name
    path.write_bytes(b"keep me\n")
    return path


OUTPUTS: dict[str, tuple[list[str], str, str]] = {
    # name: (argv with CAP/OUT, output file name, how the message names it)
    "decode --json": (["decode", "CAP", "--json", "OUT", "--quiet"], "r.json", "JSON file"),
    "decode --plot": (["decode", "CAP", "--plot", "OUT", "--quiet"], "p.svg", "plot file"),
    "describe --json": (["describe", "CAP", "--json", "OUT", "--quiet"], "d.json", "JSON file"),
    "demo --json": (["demo", "--json", "OUT", "--quiet"], "demo.json", "JSON file"),
    "learn": (["learn", "CAP", "OUT", "--quiet"], "engine.toml", "output file"),
    "simulate": (
        ["simulate", "--preset", cli_main.DEMO_PRESET, "OUT", "--duration", "0.3", "--quiet"],
        "sim.csv",
        "capture file",
    ),
    "simulate --truth": (
        ["simulate", "--preset", cli_main.DEMO_PRESET, "NEW", "--truth", "OUT", "--duration",
         "0.3", "--quiet"],
        "sim.truth.json",
        "truth file",
    ),
}


@pytest.mark.parametrize("what", list(OUTPUTS))
def test_an_existing_output_is_replaced_only_with_force(tmp_path: Path, what: str) -> None:
    argv, name, noun = OUTPUTS[what]
    cap = _capture(tmp_path / "in", "wav")
    target = _existing(tmp_path, name)
    new = tmp_path / "new.csv"
    argv = [
        str(cap) if a == "CAP" else str(target) if a == "OUT" else str(new) if a == "NEW" else a
        for a in argv
    ]
    code, out, err = run(argv)
    assert out == ""
    assert code == 2
    assert err == (
        f"toothcomb: {noun} {str(target)!r} already exists; give --force to replace it, or "
        "choose another name\n"
    )
    assert target.read_bytes() == b"keep me\n"
    assert not new.exists()  # refused before anything was written
    if what == "demo --json":
        return  # decoding the demo capture again proves nothing more
    code, _out, err = run([*argv, "--force"])
    assert code in (0, 1), err
    assert target.read_bytes() != b"keep me\n" and target.stat().st_size > 0
    if name.endswith(".json"):
        json.loads(target.read_text())


def test_write_atomic_without_overwrite_refuses_a_name_that_is_taken(tmp_path: Path) -> None:
    target = _existing(tmp_path, "r.json")
    with pytest.raises(UsageError, match="already exists; give --force"):
        write_atomic(target, "{}", what="JSON file", overwrite=False)
    assert target.read_bytes() == b"keep me\n"
    assert [p.name for p in tmp_path.iterdir()] == ["r.json"]
    fresh = tmp_path / "fresh.json"
    write_atomic(fresh, "{}\n", overwrite=False)
    assert fresh.read_text() == "{}\n"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["fresh.json", "r.json"]


def test_write_atomic_without_overwrite_loses_a_race_cleanly(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """The name is free when the command starts but taken when the result is ready."""
    target = tmp_path / "r.json"
    real_link = os.link

    def link(src: str, dst: str) -> None:
        Path(dst).write_text("someone else's\n")
        real_link(src, dst)

    monkeypatch.setattr(output.os, "link", link)
    with pytest.raises(UsageError, match="already exists"):
        write_atomic(target, "mine\n", overwrite=False)
    assert target.read_text() == "someone else's\n"
    assert [p.name for p in tmp_path.iterdir()] == ["r.json"]


# --------------------------------------------------------------------------- code from data


def _package_sources() -> list[Path]:
    import toothcomb.cli
    import toothcomb.decoders

    roots = [Path(toothcomb.decoders.__file__).parent, Path(toothcomb.cli.__file__).parent]
    return sorted(p for root in roots for p in root.rglob("*.py"))


#: what must not appear in the installed package: pickle (runs code while loading), numpy's
#: allow_pickle=True, and the eval/exec builtins
FORBIDDEN = {
    "pickle": re.compile(r"\b(c?pickle|dill|shelve|marshal)\b"),
    "allow_pickle=True": re.compile(r"allow_pickle\s*=\s*True"),
    "eval(": re.compile(r"(?<![\w.])eval\s*\("),
    "exec(": re.compile(r"(?<![\w.])exec\s*\("),
    "yaml.load": re.compile(r"\byaml\.(unsafe_)?load\s*\("),
}


def test_no_pickle_eval_or_exec_in_the_package() -> None:
    sources = _package_sources()
    assert len(sources) > 20  # the package was found
    hits = [
        f"{p.name}:{n}: {what}"
        for p in sources
        for n, line in enumerate(p.read_text(encoding="utf-8").splitlines(), 1)
        for what, pattern in FORBIDDEN.items()
        if pattern.search(line.split("#", 1)[0])
    ]
    assert hits == []


def test_numpy_load_refuses_pickles_and_modules_are_named_in_the_source() -> None:
    for p in _package_sources():
        text = p.read_text(encoding="utf-8")
        for m in re.finditer(r"\bnp\.load\s*\(([^)]*)\)", text):
            assert "allow_pickle=False" in m.group(1), f"{p.name}: {m.group(0)}"
        # importlib is only ever given a module name written in the source, never user input
        for m in re.finditer(r"\b(import_module|__import__)\s*\(([^)]*)\)", text):
            assert re.fullmatch(r"\s*\"[\w.]+\"\s*", m.group(2)), f"{p.name}: {m.group(0)}"


def test_a_profile_is_data_even_when_it_holds_code(tmp_path: Path) -> None:
    from toothcomb.decoders.errors import ToothcombError
    from toothcomb.decoders.profiles import loads_profile

    canary = tmp_path / "ran"
    code = f"__import__('pathlib').Path({str(canary)!r}).write_text('x')"
    text = (
        f'name = "{code}"\n'
        f'description = "{code}"\n'
        "[crank]\n"
        'wheel = "60-2"\n'
        "[[cams]]\n"
        'name = "intake"\n'
        'channel = "cam"\n'
        'leading_direction = "rising"\n'
        "pattern = [[16.0, 41.0]]\n"
    )
    try:
        profile = loads_profile(text)
    except ToothcombError:
        profile = None
    assert not canary.exists()
    if profile is not None:
        assert profile.name == code  # kept as the text it is

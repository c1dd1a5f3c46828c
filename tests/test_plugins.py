"""Plugins: discovery through entry points, checks on load, `toothcomb plugins`, and a worked
third-party example.

The worked example is a real package: its source (a pyproject.toml with an entry point, one
module) is written to a temporary folder, built into a wheel, installed with pip into another
folder, and that folder is put on ``sys.path`` -- exactly what ``importlib.metadata`` sees after
``pip install``. It reads a made-up text capture format, and toothcomb decodes a simulated
capture written in it. A second package carries broken plugins.
"""

from __future__ import annotations

import base64
import hashlib
import io
import json
import os
import subprocess
import sys
import textwrap
import tomllib
import zipfile
from collections.abc import Iterator
from importlib.metadata import EntryPoint, version
from pathlib import Path

import numpy as np
import pytest
from rich.console import Console
from toothcomb.cli.main import main
from toothcomb.cli.plugins_cmd import render_plugins
from toothcomb.decoders import plugins as registry
from toothcomb.decoders.errors import PluginError
from toothcomb.decoders.options import DecodeOptions
from toothcomb.decoders.pipeline import decode_capture
from toothcomb.decoders.plugins import (
    FRONTENDS,
    READERS,
    WHEELS,
    broken,
    describe_plugins,
    discover,
    plugin,
    plugins,
)
from toothcomb.decoders.readers import open_capture
from toothcomb.decoders.simulate import (
    Cam,
    ConstantSpeed,
    CrankWheel,
    HallSensor,
    Scenario,
    simulate,
    single_tooth,
)

try:
    from conftest import cam_errors, reference_check
except ImportError:  # tests collected as a package
    from tests.conftest import cam_errors, reference_check

# --------------------------------------------------------------------------- the packages

#: a third-party reader for a made-up text format: a magic line, the rate, the channel names,
#: then one line of values per sample. It streams, as a reader must.
MU_READER = '''\
"""Reader for MU-CAPTURE text files (a made-up format)."""

import itertools
import os

import numpy as np
from toothcomb.decoders.errors import CaptureError
from toothcomb.decoders.model import CaptureInfo
from toothcomb.decoders.readers.base import SourceBase, check_file, reject_options

MAGIC = "MU-CAPTURE 1"
HEAD = 3  # lines before the samples


class MuSource(SourceBase):
    def __init__(self, path, info):
        super().__init__(info)
        self._path = path

    def _pieces(self, block_size):
        with open(self._path, encoding="ascii") as f:
            for line in itertools.islice(f, HEAD):
                pass
            while rows := [r.split() for r in itertools.islice(f, block_size)]:
                yield np.array(rows, dtype=np.float64)


class MuReader:
    name = "mu"
    extensions = (".mu",)
    handles = "MU-CAPTURE text captures"

    @staticmethod
    def detect(path):
        with open(path, "rb") as f:
            return f.read(len(MAGIC)) == MAGIC.encode()

    @staticmethod
    def open(path, *, sample_rate=None, **options):
        reject_options("mu", options)
        p = check_file(path)
        with open(p, encoding="ascii") as f:
            magic, rate, names = (f.readline().split() for _ in range(HEAD))
            n = sum(1 for _ in f)
        if " ".join(magic) != MAGIC or rate[0] != "rate" or names[0] != "channels":
            raise CaptureError(f"{os.fspath(path)}: not a MU-CAPTURE 1 file")
        info = CaptureInfo(os.fspath(path), sample_rate or float(rate[1]), n,
                           tuple(names[1:]), "mu", "text")
        return MuSource(p, info)
'''

MU_PYPROJECT = """\
[build-system]
requires = ["setuptools>=61"]
build-backend = "setuptools.build_meta"

[project]
name = "mu-capture"
version = "1.2.3"
dependencies = ["toothcomb"]

[project.entry-points."toothcomb.readers"]
mu = "mu_capture_reader:MuReader"
"""

BROKEN_PYPROJECT = """\
[project]
name = "broken-bits"
version = "0.0.1"

[project.entry-points."toothcomb.readers"]
bad-import = "broken_bits.needs_missing:Reader"

[project.entry-points."toothcomb.frontends"]
half = "broken_bits.half:HalfFrontEnd"

[project.entry-points."toothcomb.wheels"]
flat = "broken_bits.flat:FlatWheel"
"""

BROKEN_FILES = {
    "broken_bits/__init__.py": "",
    # raises ModuleNotFoundError when imported
    "broken_bits/needs_missing.py": "import toothcomb_no_such_module\n\nclass Reader: ...\n",
    # a front end without process() and finish()
    "broken_bits/half.py": "class HalfFrontEnd:\n    name = 'half'\n",
    # a wheel decoder whose parse is a value, not a function
    "broken_bits/flat.py": "class FlatWheel:\n    name = 'flat'\n    parse = 'N-M'\n"
    "    decoder = staticmethod(lambda spec: None)\n",
}


def _record_hash(data: bytes) -> str:
    # source: PEP 376 / PEP 427, RECORD lines are path,sha256=<urlsafe base64 without '='>,size
    digest = base64.urlsafe_b64encode(hashlib.sha256(data).digest()).rstrip(b"=").decode()
    return f"sha256={digest}"


def build_wheel(src: Path, out: Path) -> Path:
    """The wheel of the pure-Python project in ``src``: its modules plus a ``.dist-info`` made
    from ``pyproject.toml`` (name, version, entry points), as a build backend would write it.

    # source: PEP 427 (wheel layout: WHEEL, METADATA, RECORD in NAME-VERSION.dist-info),
    # the entry points specification (entry_points.txt, one [group] section per group)
    """
    project = tomllib.loads((src / "pyproject.toml").read_text())["project"]
    name, ver = project["name"], project["version"]
    dist = name.replace("-", "_")
    info = f"{dist}-{ver}.dist-info"
    files: dict[str, bytes] = {
        p.relative_to(src).as_posix(): p.read_bytes() for p in sorted(src.rglob("*.py"))
    }
    files[f"{info}/METADATA"] = f"Metadata-Version: 2.1\nName: {name}\nVersion: {ver}\n".encode()
    files[f"{info}/WHEEL"] = (
        b"Wheel-Version: 1.0\nGenerator: toothcomb-tests\nRoot-Is-Purelib: true\n"
        b"Tag: py3-none-any\n"
    )
    groups = project.get("entry-points", {})
    files[f"{info}/entry_points.txt"] = "".join(
        f"[{g}]\n" + "".join(f"{k} = {v}\n" for k, v in eps.items()) + "\n"
        for g, eps in groups.items()
    ).encode()
    record = [f"{n},{_record_hash(d)},{len(d)}" for n, d in files.items()]
    files[f"{info}/RECORD"] = ("\n".join([*record, f"{info}/RECORD,,"]) + "\n").encode()
    wheel = out / f"{dist}-{ver}-py3-none-any.whl"
    with zipfile.ZipFile(wheel, "w") as z:
        for n, d in files.items():
            z.writestr(n, d)
    return wheel


def write_project(root: Path, pyproject: str, files: dict[str, str]) -> Path:
    root.mkdir(parents=True)
    (root / "pyproject.toml").write_text(pyproject)
    for rel, text in files.items():
        path = root / rel
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(text)
    return root


def pip_install(wheels: list[Path], target: Path) -> None:
    """``pip install --target``: the packages land in ``target`` with their .dist-info."""
    subprocess.run(
        [sys.executable, "-m", "pip", "install", "--no-deps", "--no-index", "--quiet",
         "--disable-pip-version-check", "--target", str(target), *map(str, wheels)],
        check=True,
        capture_output=True,
        text=True,
    )


@pytest.fixture(scope="module")
def site(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Both example packages, built and installed into one folder (once for this module)."""
    base = tmp_path_factory.mktemp("third-party")
    mu = write_project(base / "mu-capture", MU_PYPROJECT, {"mu_capture_reader.py": MU_READER})
    bad = write_project(base / "broken-bits", BROKEN_PYPROJECT, BROKEN_FILES)
    dist = base / "dist"
    dist.mkdir()
    target = base / "site-packages"
    pip_install([build_wheel(mu, dist), build_wheel(bad, dist)], target)
    return target


@pytest.fixture
def installed(site: Path, monkeypatch: pytest.MonkeyPatch) -> Iterator[Path]:
    """The example packages on ``sys.path``, and discovery started afresh (and again after)."""
    monkeypatch.syspath_prepend(str(site))
    registry.clear_cache()
    yield site
    registry.clear_cache()
    for mod in [m for m in sys.modules if m.startswith(("mu_capture_reader", "broken_bits"))]:
        del sys.modules[mod]


@pytest.fixture(autouse=True)
def _fresh_discovery() -> Iterator[None]:
    registry.clear_cache()
    yield
    registry.clear_cache()


# --------------------------------------------------------------------------- a capture


def hall_scenario() -> Scenario:
    return Scenario(
        duration_s=0.4,
        speed=ConstantSpeed(rpm=1500.0),
        crank=CrankWheel(wheel="36-1", sensor=HallSensor()),
        cams=(Cam(name="cam", pattern=single_tooth(430.0, 35.0), sensor=HallSensor()),),
    )


def write_mu(path: Path, samples: np.ndarray, rate: float, names: tuple[str, ...]) -> None:
    with open(path, "w", encoding="ascii") as f:
        f.write(f"MU-CAPTURE 1\nrate {rate:g}\nchannels {' '.join(names)}\n")
        np.savetxt(f, samples, fmt="%.6f")


# --------------------------------------------------------------------------- tests


def test_built_ins_are_listed_with_distribution_version_and_what_they_handle() -> None:
    infos = {(i.group, i.name): i for i in describe_plugins()}
    want = {
        (READERS, "audio"),
        (READERS, "csv"),
        (READERS, "hdf5"),
        (READERS, "vcd"),
        (FRONTENDS, "hall"),
        (FRONTENDS, "vr"),
        (WHEELS, "missing-tooth"),
    }
    assert want <= set(infos)
    for key in want:
        info = infos[key]
        assert info.ok, info.error
        assert info.distribution == "toothcomb"
        assert info.version == version("toothcomb")
        assert info.handles, key
    assert ".vcd" in infos[(READERS, "vcd")].handles
    assert "60-2" in infos[(WHEELS, "missing-tooth")].handles
    assert "Hall" in infos[(FRONTENDS, "hall")].handles


def test_plugins_command_table_and_json(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["plugins", "--width", "140"]) == 0
    table = capsys.readouterr().out
    for word in ("reader", "front end", "wheel decoder", "missing-tooth", "vcd", "hall"):
        assert word in table
    assert f"toothcomb {version('toothcomb')}" in table
    assert main(["plugins", "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    names = {(p["group"], p["name"]) for p in data["plugins"]}
    assert (WHEELS, "missing-tooth") in names and (READERS, "vcd") in names
    assert data["broken"] == []


def test_a_third_party_reader_is_installed_discovered_listed_and_used(
    installed: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # discovered, with its distribution and version from the installed metadata
    mu = plugin(READERS, "mu")
    assert mu.__module__ == "mu_capture_reader"
    assert Path(sys.modules["mu_capture_reader"].__file__).is_relative_to(installed)
    info = next(i for i in describe_plugins(READERS) if i.name == "mu")
    assert (info.distribution, info.version) == ("mu-capture", "1.2.3")
    assert info.handles == "MU-CAPTURE text captures (.mu)"

    # listed by `toothcomb plugins`
    assert main(["plugins", "--json"]) == 0
    listed = json.loads(capsys.readouterr().out)["plugins"]
    assert {"name": "mu", "distribution": "mu-capture", "version": "1.2.3", "ok": True}.items() <= (
        next(p for p in listed if p["name"] == "mu").items()
    )

    # used: a simulated capture written in its format is found by content and decoded
    sim = simulate(hall_scenario())
    path = tmp_path / "run.mu"
    write_mu(path, sim.samples, sim.sample_rate, sim.channels)
    with open_capture(path) as src:
        assert src.info.format == "mu"
        assert src.info.channels == ("crank", "cam")
        got = np.concatenate([b.data for b in src.blocks(7000)])
    np.testing.assert_allclose(got, np.round(sim.samples, 6), atol=0)

    result = decode_capture(str(path), DecodeOptions())
    assert result.capture.format == "mu"
    assert result.crank.wheel == "36-1" and result.crank.sensor == "hall"
    want, found, invented, errs = reference_check(result, sim.truth)
    assert found == want >= 8 and invented == 0
    # half a sample at the local speed: the Hall front end interpolates flanks between samples
    # common practice, no source
    half_sample_deg = 0.5 * 6.0 * 1500.0 / sim.sample_rate
    assert float(np.max(errs)) < half_sample_deg
    edge_errs = cam_errors(result, sim.truth)
    assert len(edge_errs) == 2 and max(edge_errs.values()) < 2 * half_sample_deg

    # and through the command line, as a user would
    assert main(["decode", str(path), "--json", "-", "--quiet"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["capture"]["channels"] == ["crank", "cam"]
    assert out["crank"]["wheel"] == "36-1"


def test_a_fresh_interpreter_finds_the_installed_plugin(installed: Path) -> None:
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(installed), *sys.path])}
    run = subprocess.run(
        [sys.executable, "-m", "toothcomb.cli", "plugins", "--json"],
        capture_output=True,
        text=True,
        env=env,
        check=False,
    )
    assert run.returncode == 0, run.stderr
    listed = {p["name"]: p for p in json.loads(run.stdout)["plugins"]}
    assert listed["mu"]["distribution"] == "mu-capture" and listed["mu"]["ok"]
    assert not listed["bad-import"]["ok"]


def test_broken_plugins_are_named_and_do_not_break_the_others(
    installed: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # an import error names the plugin, its target and what failed to import
    with pytest.raises(PluginError) as e:
        plugin(READERS, "bad-import")
    msg = str(e.value)
    assert "'bad-import'" in msg and "toothcomb.readers" in msg
    assert "broken_bits.needs_missing:Reader" in msg and "toothcomb_no_such_module" in msg
    assert e.value.exit_code == 2 and isinstance(e.value, RuntimeError)

    # a plugin without what its group needs: the missing attributes are named
    with pytest.raises(PluginError, match=r"plugin 'half' in group toothcomb\.frontends lacks "
                                          r"process, finish"):
        plugin(FRONTENDS, "half")
    with pytest.raises(PluginError, match=r"'flat' in group toothcomb\.wheels: parse must be "
                                          r"callable"):
        plugin(WHEELS, "flat")
    assert set(broken(READERS)) == {"bad-import"}
    assert set(broken(FRONTENDS)) == {"half"}
    assert set(broken(WHEELS)) == {"flat"}

    # the working ones are all there, the third-party reader too
    assert {"audio", "csv", "hdf5", "vcd", "mu"} <= set(plugins(READERS))
    assert set(plugins(FRONTENDS)) == {"hall", "vr"}
    assert set(plugins(WHEELS)) == {"missing-tooth", "pattern"}

    # the listing shows them with their errors, and still lists everything else
    assert main(["plugins", "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert sorted(data["broken"]) == [
        "toothcomb.frontends:half",
        "toothcomb.readers:bad-import",
        "toothcomb.wheels:flat",
    ]
    by_name = {p["name"]: p for p in data["plugins"]}
    assert by_name["bad-import"]["distribution"] == "broken-bits"
    assert "toothcomb_no_such_module" in by_name["bad-import"]["error"]
    assert by_name["missing-tooth"]["ok"] and by_name["mu"]["ok"]
    out = io.StringIO()
    render_plugins(describe_plugins(), Console(file=out, width=200))
    text = out.getvalue()
    assert "not usable: plugin 'half'" in text
    assert "3 plugin(s) could not be used and are left out" in text

    # and a decode with the broken ones installed works as before
    sim = simulate(hall_scenario())
    path = tmp_path / "run.h5"
    sim.write(path)
    result = decode_capture(str(path), DecodeOptions(wheel="36-1"))
    assert result.crank.wheel == "36-1"
    want, found, invented, _ = reference_check(result, sim.truth)
    assert found == want and invented == 0


def _fake_entry_points(monkeypatch: pytest.MonkeyPatch, eps: list[EntryPoint]) -> None:
    def fake(group: str) -> list[EntryPoint]:
        return [ep for ep in eps if ep.group == group]

    monkeypatch.setattr(registry, "entry_points", fake)
    registry.clear_cache()


def test_same_name_twice_keeps_the_first_and_reports_the_clash(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    eps = [
        EntryPoint("csv", "toothcomb.decoders.readers.scopecsv:ScopeCsvReader", READERS),
        EntryPoint("csv", "toothcomb.decoders.readers.hdf5:Hdf5Reader", READERS),
    ]
    _fake_entry_points(monkeypatch, eps)
    assert plugin(READERS, "csv").__name__ == "ScopeCsvReader"
    found = [d for d in discover(READERS) if d.name == "csv"]
    assert [d.ok for d in found] == [True, False]
    assert "registers the same name" in str(found[1].error)
    assert broken(READERS) == {}  # the name works: the first one serves it
    # the built-ins that were not among the entry points come from the source tree
    assert {"audio", "hdf5", "vcd"} <= set(plugins(READERS))


def test_reader_with_bad_extensions_and_unknown_names(monkeypatch: pytest.MonkeyPatch) -> None:
    with pytest.raises(PluginError, match=r"extensions '\.x'; give a tuple of suffixes"):
        registry.check_plugin(
            READERS,
            "odd",
            type("Odd", (), {"name": "odd", "extensions": ".x", "detect": len, "open": len}),
        )
    with pytest.raises(PluginError, match=r"no plugin 'nope' in group toothcomb\.wheels \(there "
                                          r"are: missing-tooth, pattern\)"):
        plugin(WHEELS, "nope")
    with pytest.raises(PluginError, match=r"no plugin group 'toothcomb\.other'"):
        plugins("toothcomb.other")


def test_the_example_reader_source_is_the_one_documented() -> None:
    """DEVELOPERS.md shows this worked example; keep the two the same."""
    doc = (Path(__file__).resolve().parents[1] / "DEVELOPERS.md").read_text(encoding="utf-8")
    assert textwrap.dedent(MU_PYPROJECT).strip() in doc
    after = doc[doc.index("`mu_capture_reader.py`") :]
    block = after[after.index("```python\n") + len("```python\n") :]
    block = block[: block.index("```")]
    module = MU_READER.split("\n", 2)[2]  # without its docstring line and the blank after it
    assert block.strip() == module.strip()

#!/usr/bin/env python3
"""Decode speed against reading the file, and peak memory, on long captures.

The targets (toothcomb issue 6): decoding a two-channel 16-bit WAV (crank and one cam, Hall or
VR) end to end takes at most 1.5 times what ``soundfile`` alone needs to read the same file into
float32 arrays, measured side by side in one run; peak resident memory stays flat as captures
grow (60 minutes at 192 kHz within about 300 MB), for WAV, CSV and HDF5 alike; a scope CSV is
parsed in blocks at least as fast as numpy's own text loader.

What it does:

1. writes simulated captures into a scratch folder, block by block (making them needs little
   memory): the idle demo scenario (60-2 crank, single-window Hall cam, 800 rpm) recorded by a
   sound card at ``--rate`` as 16-bit WAV, once with a VR and once with a Hall crank sensor, for
   every length in ``--minutes``; an HDF5 file (float32) of the longest length; a scope CSV of
   about ``--csv-mb`` megabytes (500 kS/s, 8-bit);
2. in a fresh process per capture: reads the WAV with ``soundfile`` into float32 blocks of the
   decoder's block size, decodes it as toothcomb does by default (on a long capture the crank's
   front end runs in a forked worker process) and once more in one process (``--one-process``),
   and repeats the three ``--repeats`` times (the fastest of each count: the page cache is warm
   for all, and a busy moment of the machine drops out); reports the times, the ratios to the
   read, the decode's peak resident memory (``ru_maxrss``), the worker's (pages it shares with
   the decode included) and the peak of both processes' proportional set sizes together
   (sampled every 50 ms: shared pages count once); in a process of its own, reads the WAV in one
   piece as well when it fits ``--one-shot-mb``; then, from the shortest and the longest WAV of
   each sensor, what each minute of capture more adds to the decode and to the read (the
   throughput, apart from the fixed work at a decode's start and end) and that fixed part;
3. for the CSV: times toothcomb's parse of the whole file (done once, when it is opened: every
   row checked, the clock fitted, the values spooled for the decode's passes), once without
   pyarrow (by the vectorised readers or numpy's parser) and, when the ``fast-csv`` extra is
   installed, once by pyarrow's CSV reader, each ``--repeats`` times alternating with
   ``numpy.loadtxt`` on the file's first ``--loadtxt-rows`` rows (rows per second, the fastest
   of each), the spooled values
   read back, and the decode's time and peak memory; the same for a CSV of about
   ``--fixed-csv-mb`` megabytes whose channels are printed at five fixed decimals, as a data
   logger or a high-resolution export prints them (a float capture: nearly every value
   distinct);
4. with ``--profile``: decodes each WAV once more under cProfile and prints the share of each
   stage (levels, first seconds, reading, front ends, tracker and cam locator, result) with
   what it comes to in seconds and in multiples of the read;
5. removes the scratch folder unless ``--keep DIR`` names one (files found there are reused).

Every measuring process first sets the C allocator's thresholds as the command line does
(``toothcomb.decoders.heap.keep_freed_memory``; the reads and ``numpy.loadtxt`` run with them as
well); ``--default-heap`` leaves them as they are.

    python benchmarks/scale.py                        # 1, 10, 60 min at 192 kHz: 9 GB, ~30 min
    python benchmarks/scale.py --minutes 1 10         # shorter
    python benchmarks/scale.py --keep /tmp/tc-scale   # keep (and reuse) the captures
    python benchmarks/scale.py --only wav             # skip the CSV and HDF5 parts
    python benchmarks/scale.py --minutes 10 --only wav --profile   # where the time goes

The simulated sound card runs without oversampling (``oversample=1``) so that an hour of capture
is made in minutes; the decoder sees the same kind of signal either way. Timing is wall-clock on
whatever else the machine is doing: run it twice and compare.
"""

from __future__ import annotations

import argparse
import dataclasses
import importlib.util
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

#: run in a fresh process: read side by side with the decode, then peak memory
MEASURE = r"""
from toothcomb.decoders.heap import keep_freed_memory
keep_freed_memory()  # as the command line does, unless --default-heap (see run())
import json, resource, sys, time
import numpy as np, soundfile as sf
from toothcomb.decoders.options import DecodeOptions
from toothcomb.decoders.pipeline import decode_capture

path, bs, repeats, marker = sys.argv[1], int(sys.argv[2]), int(sys.argv[3]), sys.argv[4]

def read_blocks():
    t0 = time.perf_counter()
    n = 0
    with sf.SoundFile(path) as f:
        for b in f.blocks(blocksize=bs, dtype="float32", always_2d=True):
            n += b.shape[0]
    return time.perf_counter() - t0

def decode(worker=True):
    t0 = time.perf_counter()
    r = decode_capture(path, DecodeOptions(block_size=bs, worker_process=worker))
    return time.perf_counter() - t0, r

reads, decodes, alone = [], [], []
for _ in range(repeats):
    reads.append(read_blocks())
    dt, r = decode()
    decodes.append(dt)
    alone.append(decode(worker=False)[0])
# one decode more, untimed, while the caller samples the memory of this process and its worker
open(marker, "w").close()
decode()
peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
# the worker processes (a fork shares the decode's pages: they count in both figures)
worker_peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024.0
info = sf.info(path)
print(json.dumps({
    "read_s": min(reads), "decode_s": min(decodes), "peak_mib": peak,
    "alone_s": min(alone), "worker_peak_mib": worker_peak,
    "frames": info.frames, "revolutions": r.crank.revolutions,
    "references": len(r.crank.reference_times_s), "sync_losses": r.crank.sync_losses,
    "rpm": r.crank.rpm.mean,
    "cam_edges": [[e.direction, round(e.angle.mean, 3), e.angle.n] for e in r.cams[0].edges],
}))
"""

#: the whole WAV read in one piece (its own process: the array does not count in the decode's
#: memory)
ONE_SHOT = r"""
from toothcomb.decoders.heap import keep_freed_memory
keep_freed_memory()  # as the command line does, unless --default-heap (see run())
import json, sys, time
import soundfile as sf
t0 = time.perf_counter()
x, _ = sf.read(sys.argv[1], dtype="float32", always_2d=True)
print(json.dumps({"one_shot_s": time.perf_counter() - t0}))
"""

#: one decode under cProfile: where its time goes, by stage: the cumulative time of the
#: functions (name, a piece of their file's path) that decode_capture calls for each stage,
#: directly, from a comprehension or closure of its own or through the edge pass; a name
#: missing in this version counts 0
PROFILE = r"""
from toothcomb.decoders.heap import keep_freed_memory
keep_freed_memory()  # as the command line does, unless --default-heap (see run())
import cProfile, json, pstats, sys, time
from toothcomb.decoders.options import DecodeOptions
from toothcomb.decoders.pipeline import decode_capture
path, bs = sys.argv[1], int(sys.argv[2])
stages = json.loads(sys.argv[3])
decode_capture(path, DecodeOptions(block_size=bs))  # warm: imports, page cache
prof = cProfile.Profile()
t0 = time.perf_counter()
prof.enable()
decode_capture(path, DecodeOptions(block_size=bs))
prof.disable()
wall = time.perf_counter() - t0
stats = pstats.Stats(prof).stats
total = next(v[3] for k, v in stats.items() if k[2] == "decode_capture")
def from_decode(caller):
    return caller[2] in ("decode_capture", "handle") or caller[0].endswith("edgepass.py") or (
        caller[0].endswith("pipeline.py") and caller[2] in ("<dictcomp>", "<listcomp>"))
out = {}
for label, funcs in stages.items():
    t = 0.0
    for k, v in stats.items():
        if any(k[2] == name and where in k[0] for name, where in funcs):
            t += sum(c[3] for caller, c in v[4].items() if from_decode(caller))
    out[label] = t
print(json.dumps({"wall_s": wall, "profiled_s": total, "stages": out}))
"""

#: the stages of a decode, as (function name, piece of its file's path) that decode_capture
#: calls for them
STAGES = {
    "levels": [("estimate_levels", "levels.py")],
    "probe, channel identification, front-end calibration": [
        ("read_probe", "pipeline.py"), ("look_at_channel", "identify.py"),
        ("_clip_marks", "pipeline.py"),
    ],
    "first seconds: crank channel, wheel (their edges: the decode pass)": [
        ("plan_crank", "pipeline.py"),
        ("_pick_crank", "pipeline.py"), ("_tooth_offsets", "pipeline.py"),
        ("_clipped_teeth", "pipeline.py"), ("vr_centre_direction", "cams.py"),
    ],
    "decode pass: reading the samples": [("code_blocks", "readers"), ("blocks", "readers")],
    "decode pass: front ends (samples -> edges)": [
        ("process_codes", "frontends"), ("process", "frontends"), ("finish", "frontends"),
        ("release", "frontends"), ("process", "pipeline.py"), ("finish", "pipeline.py"),
    ],
    "decode pass: tooth tracker, cam locator, jitter, speed": [
        ("hand_over", "pipeline.py"), ("take", "pipeline.py"), ("feed", "wheels"),
        ("finish", "wheels"), ("finish", "timeline.py"), ("flush", "jitter.py"),
    ],
    "result: cam edges, phaser, findings": [("_result", "pipeline.py")],
}

#: decode only, for peak memory of CSV and HDF5 captures
DECODE_ONLY = r"""
from toothcomb.decoders.heap import keep_freed_memory
keep_freed_memory()  # as the command line does, unless --default-heap (see run())
import json, resource, sys, time
if sys.argv[3:] == ["numpy"]:
    sys.modules["pyarrow"] = None  # as if the fast-csv extra were not installed
from toothcomb.decoders.options import DecodeOptions
from toothcomb.decoders.pipeline import decode_capture
t0 = time.perf_counter()
r = decode_capture(sys.argv[1], DecodeOptions(block_size=int(sys.argv[2])))
dt = time.perf_counter() - t0
print(json.dumps({"decode_s": dt,
                  "peak_mib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0,
                  "worker_peak_mib": resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024,
                  "samples": r.capture.n_samples, "revolutions": r.crank.revolutions,
                  "references": len(r.crank.reference_times_s)}))
"""

#: every channel of an HDF5 capture read through h5py, a block at a time, as stored (the
#: counterpart of soundfile's read of a WAV)
H5_READ = r"""
import json, sys, time
import h5py
t0 = time.perf_counter()
with h5py.File(sys.argv[1], "r") as f:
    for name in f:
        ds = f[name]
        for a in range(0, ds.shape[0], int(sys.argv[2])):
            ds[a : a + int(sys.argv[2])]
print(json.dumps({"read_s": time.perf_counter() - t0}))
"""

#: blockwise CSV parse against numpy.loadtxt on the same rows
CSV_PARSE = r"""
from toothcomb.decoders.heap import keep_freed_memory
keep_freed_memory()  # as the command line does, unless --default-heap (see run())
import json, resource, sys, time
if sys.argv[4] == "numpy":
    sys.modules["pyarrow"] = None  # as if the fast-csv extra were not installed
import numpy as np
from toothcomb.decoders.readers import open_capture
path, bs, rows, repeats = sys.argv[1], int(sys.argv[2]), int(sys.argv[3]), int(sys.argv[5])
# the header: comment lines start with '#', then one line of names
with open(path) as f:
    skip = 0
    for line in f:
        skip += 1
        if not line.startswith("#"):
            break
opens, loads = [], []
for k in range(repeats):  # alternating, so that both see the machine's busy moments alike
    t0 = time.perf_counter()
    src = open_capture(path)
    opens.append(time.perf_counter() - t0)
    if k == 0:
        n = 0
        t0 = time.perf_counter()
        for b in src.blocks(bs):
            n += b.data.shape[0]
        t_blocks = time.perf_counter() - t0
    src.close()
    t0 = time.perf_counter()
    x = np.loadtxt(path, delimiter=",", skiprows=skip, max_rows=rows, ndmin=2)
    loads.append(time.perf_counter() - t0)
from toothcomb.decoders.readers.scopecsv import _arrow_modules
print(json.dumps({"rows": n, "open_s": min(opens), "opens": opens, "blocks_s": t_blocks,
                  "arrow": _arrow_modules() is not None,
                  "loadtxt_rows": int(x.shape[0]), "loadtxt_s": min(loads), "loads": loads,
                  "peak_mib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0}))
"""

BASELINE = r"""
from toothcomb.decoders.heap import keep_freed_memory
keep_freed_memory()  # as the command line does, unless --default-heap (see run())
import json, resource
import numpy, scipy, soundfile, h5py, rich
import toothcomb.decoders.pipeline
print(json.dumps({"peak_mib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0}))
"""


def scenario(crank: str, seconds: float, rate: float, instrument: str = "soundcard"):
    """The idle demo scenario at ``rate``, with a ``crank`` ("vr" or "hall") crank sensor."""
    from toothcomb.decoders.simulate import HallSensor, Instrument, preset

    sc = preset("idle-60-2-vr-soundcard", duration_s=seconds)
    if instrument == "soundcard":
        inst = dataclasses.replace(sc.instrument, sample_rate=rate, oversample=1)
    elif instrument == "scope":
        inst = Instrument(kind="scope", sample_rate=rate, bits=8, range_v=(-1.0, 1.0))
    else:
        inst = Instrument(kind="float", sample_rate=rate)
    sc = sc.replace(instrument=inst)
    if crank == "hall":
        sc = sc.replace(crank=dataclasses.replace(sc.crank, sensor=HallSensor()))
    return sc


def make(path: Path, sc, subtype: str | None = None) -> float:
    """Write ``sc`` to ``path`` (skipped when it exists); seconds it took."""
    from toothcomb.decoders.simulate import write_scenario

    if path.exists():
        return 0.0
    t0 = time.perf_counter()
    write_scenario(sc, path, subtype=subtype, block_size=1 << 18)
    return time.perf_counter() - t0


def _pss_kib(pid: int) -> int:
    """Proportional set size of ``pid`` (KiB; Linux): each shared page counts as its share."""
    try:
        with open(f"/proc/{pid}/smaps_rollup") as f:
            for line in f:
                if line.startswith("Pss:"):
                    return int(line.split()[1])
    except OSError:
        pass
    return 0


def _children(pid: int) -> list[int]:
    try:
        with open(f"/proc/{pid}/task/{pid}/children") as f:
            return [int(x) for x in f.read().split()]
    except OSError:
        return []


#: run the measurements with the C allocator's own thresholds (``--default-heap``), not those
#: the command line sets (toothcomb.decoders.heap)
DEFAULT_HEAP = False


def _has_pyarrow() -> bool:
    return importlib.util.find_spec("pyarrow") is not None


def run(code: str, *args: str, marker: Path | None = None) -> dict:
    """Run ``code`` in a fresh interpreter; its JSON output. With ``marker`` (a path the code
    creates when it starts what is to be measured) it has ``pss_mib`` too: the peak of the
    process's and its children's proportional set sizes together from then on, sampled every
    50 ms (Linux; 0 elsewhere), which counts the pages a forked worker shares with the decode
    once. (Sampling reads the processes' page tables, so it is kept out of the timed part.)"""
    with tempfile.TemporaryFile("w+") as out, tempfile.TemporaryFile("w+") as err:
        if DEFAULT_HEAP:
            code = code.replace("keep_freed_memory()  #", "pass  #")
        proc = subprocess.Popen([sys.executable, "-c", code, *args], stdout=out, stderr=err,
                                text=True)
        pss = 0
        while proc.poll() is None:
            if marker is not None and marker.exists():
                pss = max(pss, sum(_pss_kib(p) for p in [proc.pid, *_children(proc.pid)]))
            time.sleep(0.05)
        out.seek(0)
        err.seek(0)
        if proc.returncode != 0:
            raise SystemExit(f"{args[0] if args else 'baseline'}: {err.read().strip()}")
        result = json.loads(out.read())
    result["pss_mib"] = pss / 1024.0
    return result


def _print_profile(path: Path, block_size: int, measured: dict) -> None:
    """Where one decode of ``path`` spends its time, by stage. cProfile slows the decode down,
    so each stage is given as its share of the profiled decode and, by that share, in seconds
    of the unprofiled decode just measured and in multiples of the read."""
    p = run(PROFILE, str(path), str(block_size), json.dumps(STAGES))
    total = p["profiled_s"]
    decode_s, read_s = measured["decode_s"], measured["read_s"]
    print(f"      where the decode's time goes (cProfile: {total:.2f} s profiled; shares of the "
          f"{decode_s:.2f} s decode):")
    rest = total
    for label, t in [*p["stages"].items(), ("other: the loop itself, checks", None)]:
        t = rest if t is None else t
        rest -= t
        share = t / total
        print(f"      {100 * share:5.1f} %  {share * decode_s:6.2f} s  "
              f"{share * decode_s / read_s:5.2f} x read  {label}")
    print(flush=True)


def csv_seconds(folder: Path, megabytes: float, rate: float) -> float:
    """Seconds of scope capture that make a CSV of about ``megabytes``."""
    probe = folder / "size-probe.csv"
    make(probe, scenario("vr", 0.2, rate, "scope"))
    per_s = probe.stat().st_size / 0.2
    probe.unlink()
    return max(1.0, round(megabytes * 1e6 / per_s))


def _print_per_minute(measured: dict[str, dict[float, dict]]) -> None:
    """What each minute of capture adds to the decode and to the read, from the shortest and
    the longest WAV of each sensor (the difference of their times over the difference of their
    lengths), and what is left of the shortest decode at no length: its fixed part."""
    lines = []
    for crank, by_length in measured.items():
        if len(by_length) < 2:
            continue
        m0, m1 = min(by_length), max(by_length)
        r0, r1 = by_length[m0], by_length[m1]
        span = m1 - m0
        decode = (r1["decode_s"] - r0["decode_s"]) / span
        alone = (r1["alone_s"] - r0["alone_s"]) / span
        read = (r1["read_s"] - r0["read_s"]) / span
        fixed = r0["decode_s"] - decode * m0
        lines.append(f"  {crank:>4}: decode {decode:.3f} s, read {read:.3f} s, ratio "
                     f"{decode / read:.2f} (one process {alone:.3f} s, {alone / read:.2f}); "
                     f"fixed part of a decode {fixed:.3f} s")
    if lines:
        print(f"each minute of capture more, from {min(min(v) for v in measured.values()):g} to "
              f"{max(max(v) for v in measured.values()):g} min (the throughput, without the "
              "fixed work of a decode's start and end):")
        print("\n".join(lines), flush=True)


def make_fixed_csv(path: Path, sc, decimals: int = 5) -> float:
    """Write ``sc`` to ``path`` as a CSV whose channels are printed at ``decimals`` fixed
    decimals, as a data logger or a high-resolution scope export prints them (nearly every value
    distinct), block by block (skipped when it exists); seconds it took."""
    import numpy as np
    from toothcomb.decoders.simulate.render import iter_blocks

    if path.exists():
        return 0.0
    t0 = time.perf_counter()
    fs = sc.sample_rate
    names = [c.label for c in sc.resolved_channels()]
    tmp = path.with_suffix(".part")
    with open(tmp, "w") as f:
        f.write("time_s," + ",".join(names) + "\n")
        for b in iter_blocks(sc, 1 << 18):
            t = (b.start + np.arange(len(b.data))) / fs
            np.savetxt(f, np.column_stack([t, b.data]), delimiter=",",
                       fmt=["%.7f"] + [f"%.{decimals}f"] * b.data.shape[1])
    tmp.replace(path)
    return time.perf_counter() - t0


def csv_part(path: Path, label: str, made: float, a: argparse.Namespace) -> None:
    """Time the parse of the CSV ``path`` against numpy.loadtxt, both ways, and decode it."""
    size = path.stat().st_size / 1e6
    print(f"\n{label} ({size:.0f} MB, made in {made:.0f} s)")
    ways = ["numpy", "arrow"] if _has_pyarrow() else ["numpy"]
    for way in ways:
        p = run(CSV_PARSE, str(path), str(a.block_size), str(a.loadtxt_rows), way,
                str(a.repeats))
        ours = p["rows"] / p["open_s"]
        theirs = p["loadtxt_rows"] / p["loadtxt_s"]
        how = ("by pyarrow's CSV reader (the fast-csv extra)" if p.get("arrow")
               else "without pyarrow: by the vectorised readers or numpy's parser, in "
               "512 kB chunks")
        spread = ", ".join(f"{t:.1f}" for t in p["opens"])
        print(f"  parse {how} (open: every row parsed once, checked, the clock fitted, "
              f"the values spooled), best of {a.repeats} ({spread} s): "
              f"{p['open_s']:.1f} s, {p['rows']} rows, {ours / 1e6:.2f} M rows/s, "
              f"{size / p['open_s']:.0f} MB/s")
        spread = ", ".join(f"{t:.2f}" for t in p["loads"])
        print(f"    numpy.loadtxt on its first {p['loadtxt_rows']} rows, after each: best "
              f"{p['loadtxt_s']:.2f} s ({spread}), {theirs / 1e6:.2f} M rows/s; "
              f"ours/loadtxt {ours / theirs:.2f}")
        print(f"    the parsed values read back in blocks (the decode's passes): "
              f"{p['blocks_s']:.1f} s, {p['rows'] / p['blocks_s'] / 1e6:.0f} M rows/s",
              flush=True)
        r = run(DECODE_ONLY, str(path), str(a.block_size), way)
        print(f"    decode: {r['decode_s']:.1f} s, peak {r['peak_mib']:.0f} MiB, "
              f"{r['references']} reference events", flush=True)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawTextHelpFormatter)
    ap.add_argument("--minutes", type=float, nargs="+", default=[1.0, 10.0, 60.0],
                    help="WAV capture lengths in minutes (default: 1 10 60)")
    ap.add_argument("--rate", type=float, default=192000.0, help="WAV sample rate (Hz)")
    ap.add_argument("--sensors", nargs="+", default=["vr", "hall"], choices=["vr", "hall"],
                    help="crank sensors to simulate (default: vr hall)")
    ap.add_argument("--block-size", type=int, default=1 << 16, help="samples per block")
    ap.add_argument("--repeats", type=int, default=3, help="read/decode pairs per capture")
    ap.add_argument("--one-shot-mb", type=float, default=1200.0,
                    help="also time a one-piece read when the float32 array is this small")
    ap.add_argument("--csv-mb", type=float, default=1000.0, help="size of the scope CSV (MB)")
    ap.add_argument("--fixed-csv-mb", type=float, default=300.0,
                    help="about the size of the CSV at fixed decimals (MB; 0: none)")
    ap.add_argument("--loadtxt-rows", type=int, default=3_000_000,
                    help="rows numpy.loadtxt parses for the comparison")
    ap.add_argument("--only", nargs="+", default=["wav", "csv", "hdf5"],
                    choices=["wav", "csv", "hdf5"], help="parts to run")
    ap.add_argument("--keep", metavar="DIR", help="keep (and reuse) the captures in DIR")
    ap.add_argument("--default-heap", action="store_true",
                    help="leave the C allocator's thresholds as they are (the command line "
                         "sets them: toothcomb.decoders.heap)")
    ap.add_argument("--profile", action="store_true",
                    help="also profile one decode of each WAV and print where its time goes")
    a = ap.parse_args(argv)
    global DEFAULT_HEAP
    DEFAULT_HEAP = a.default_heap

    folder = Path(a.keep) if a.keep else Path(tempfile.mkdtemp(prefix="toothcomb-scale-"))
    folder.mkdir(parents=True, exist_ok=True)
    try:
        base = run(BASELINE)["peak_mib"]
        print(f"python {sys.version.split()[0]}, {os.cpu_count()} cpu, block size "
              f"{a.block_size}; imports alone: {base:.0f} MiB peak")
        if "wav" in a.only:
            print(f"\n2-channel 16-bit WAV at {a.rate:g} Hz: soundfile read into float32 blocks "
                  "against the whole decode, side by side")
            print("(decode: as toothcomb decodes by default, with the crank's front end in a "
                  "worker process on long captures; 1-proc: --one-process; peak: the decode "
                  "process's RSS; worker: the worker's RSS, pages shared with the decode "
                  "included; PSS: both together, shared pages counted once)")
            print(f"{'crank':>5} {'min':>5} {'MB':>7} {'make s':>7} {'read s':>7} {'1-shot s':>8} "
                  f"{'decode s':>9} {'ratio':>6} {'1-proc s':>8} {'ratio':>6} {'Msamp/s':>8} "
                  f"{'peak MiB':>9} {'worker':>7} {'PSS':>5}  result")
            measured: dict[str, dict[float, dict]] = {crank: {} for crank in a.sensors}
            for minutes in a.minutes:
                for crank in a.sensors:
                    path = folder / f"idle-{crank}-{minutes:g}min.wav"
                    made = make(path, scenario(crank, minutes * 60.0, a.rate))
                    marker = folder / "measuring-memory"
                    marker.unlink(missing_ok=True)
                    r = run(MEASURE, str(path), str(a.block_size), str(a.repeats), str(marker),
                            marker=marker)
                    marker.unlink(missing_ok=True)
                    r["one_shot_s"] = None
                    if r["frames"] * 2 * 4 / 1e6 <= a.one_shot_mb:
                        r["one_shot_s"] = run(ONE_SHOT, str(path))["one_shot_s"]
                    one = f"{r['one_shot_s']:8.2f}" if r["one_shot_s"] is not None else "       -"
                    rate = r["frames"] * 2 / r["decode_s"] / 1e6
                    edges = " ".join(f"{d[0]} {d[1]:.2f} (n {d[2]})" for d in r["cam_edges"])
                    print(f"{crank:>5} {minutes:5g} {path.stat().st_size / 1e6:7.0f} {made:7.0f} "
                          f"{r['read_s']:7.2f} {one} {r['decode_s']:9.2f} "
                          f"{r['decode_s'] / r['read_s']:6.2f} {r['alone_s']:8.2f} "
                          f"{r['alone_s'] / r['read_s']:6.2f} {rate:8.1f} {r['peak_mib']:9.0f} "
                          f"{r['worker_peak_mib']:7.0f} {r['pss_mib']:5.0f}  "
                          f"{r['rpm']:.0f} rpm, {r['references']} refs, "
                          f"{r['sync_losses']} losses; cam {edges}", flush=True)
                    measured[crank][minutes] = r
                    if a.profile:
                        _print_profile(path, a.block_size, r)
            _print_per_minute(measured)
        longest = max(a.minutes)
        if "hdf5" in a.only:
            path = folder / f"idle-vr-{longest:g}min.h5"
            made = make(path, scenario("vr", longest * 60.0, a.rate, "float"), "float32")
            # twice, the best: the first may read the file from the disk, the decode does not
            read = min(run(H5_READ, str(path), str(a.block_size))["read_s"] for _ in range(2))
            r = run(DECODE_ONLY, str(path), str(a.block_size))
            print(f"\nHDF5 float32, {longest:g} min at {a.rate:g} Hz "
                  f"({path.stat().st_size / 1e6:.0f} MB, made in {made:.0f} s): h5py reads it in "
                  f"{read:.1f} s; decode {r['decode_s']:.1f} s ({r['decode_s'] / read:.2f} of the "
                  f"read), peak {r['peak_mib']:.0f} MiB (worker {r['worker_peak_mib']:.0f} MiB), "
                  f"{r['references']} reference events", flush=True)
        if "csv" in a.only:
            rate = 500_000.0
            seconds = csv_seconds(folder, a.csv_mb, rate)
            path = folder / f"scope-vr-{seconds:g}s.csv"
            made = make(path, scenario("vr", seconds, rate, "scope"))
            csv_part(path, f"scope CSV (8-bit), {seconds:g} s at {rate:g} Hz", made, a)
            if a.fixed_csv_mb > 0:
                seconds = max(1.0, round(seconds * a.fixed_csv_mb / a.csv_mb))
                path = folder / f"logger-vr-{seconds:g}s.csv"
                made = make_fixed_csv(path, scenario("vr", seconds, rate, "float"))
                csv_part(path, f"CSV at fixed decimals (values all but unique), {seconds:g} s at "
                         f"{rate:g} Hz", made, a)
    finally:
        if not a.keep:
            shutil.rmtree(folder, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())

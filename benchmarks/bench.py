#!/usr/bin/env python3
"""Speed and memory of a decode against capture length.

Writes simulated captures of the idle demo scenario (sound card, 48 kHz, 2 channels) of several
lengths into a scratch folder (generated block by block, so making them needs little memory),
then decodes each in a fresh process and reports wall time, samples per second and the peak
resident memory of that process. Memory should stay nearly flat as captures grow: samples are
processed in blocks; only the edges (a few numbers per tooth) are kept.

    python benchmarks/bench.py                   # 10 s, 60 s, 300 s
    python benchmarks/bench.py --lengths 10 600  # choose the lengths (seconds)
    python benchmarks/bench.py --keep DIR        # keep the captures in DIR for reuse

Timing is wall-clock on whatever else the machine is doing; run it twice and compare.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

DECODE = r"""
import json, resource, sys, time
from toothcomb.decoders.pipeline import decode_capture
from toothcomb.decoders.options import DecodeOptions
t0 = time.perf_counter()
r = decode_capture(sys.argv[1], DecodeOptions(block_size=int(sys.argv[2])))
dt = time.perf_counter() - t0
peak_kib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
print(json.dumps({"seconds": dt, "peak_mib": peak_kib / 1024.0,
                  "n_samples": r.capture.n_samples, "revolutions": r.crank.revolutions,
                  "edge0": r.cams[0].edges[0].angle.mean}))
"""

BASELINE = r"""
import resource, json
import numpy, scipy, soundfile, h5py, rich
import toothcomb.decoders.pipeline
print(json.dumps({"peak_mib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0}))
"""


def make(path: Path, seconds: float) -> float:
    from toothcomb.decoders.simulate import preset, write_scenario

    t0 = time.perf_counter()
    write_scenario(preset("idle-60-2-vr-soundcard", duration_s=seconds), path)
    return time.perf_counter() - t0


def run(code: str, *args: str) -> dict:
    out = subprocess.run([sys.executable, "-c", code, *args], capture_output=True, text=True)
    if out.returncode != 0:
        raise SystemExit(out.stderr.strip().splitlines()[-1])
    return json.loads(out.stdout)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawTextHelpFormatter)
    ap.add_argument("--lengths", type=float, nargs="+", default=[10.0, 60.0, 300.0],
                    help="capture lengths in seconds (default: 10 60 300)")
    ap.add_argument("--block-size", type=int, default=1 << 16, help="samples per block")
    ap.add_argument("--keep", metavar="DIR", help="keep (and reuse) the captures in DIR")
    a = ap.parse_args(argv)

    folder = Path(a.keep) if a.keep else Path(tempfile.mkdtemp(prefix="toothcomb-bench-"))
    folder.mkdir(parents=True, exist_ok=True)
    base = run(BASELINE)["peak_mib"]
    print(f"python {sys.version.split()[0]}, {os.cpu_count()} cpu; "
          f"imports alone: {base:.0f} MiB peak")
    print(f"{'length s':>9} {'samples':>11} {'make s':>7} {'decode s':>9} {'Msamples/s':>11} "
          f"{'peak MiB':>9} {'over imports':>13}")
    for seconds in a.lengths:
        path = folder / f"idle-{seconds:g}s.flac"
        made = 0.0 if path.exists() else make(path, seconds)
        r = run(DECODE, str(path), str(a.block_size))
        rate = r["n_samples"] * 2 / r["seconds"] / 1e6
        print(f"{seconds:9g} {r['n_samples']:11d} {made:7.1f} {r['seconds']:9.2f} {rate:11.2f} "
              f"{r['peak_mib']:9.0f} {r['peak_mib'] - base:13.0f}")
    if not a.keep:
        for p in folder.iterdir():
            p.unlink()
        folder.rmdir()
    return 0


if __name__ == "__main__":
    sys.exit(main())

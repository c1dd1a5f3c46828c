"""The allocator thresholds the command line sets (toothcomb.decoders.heap)."""

from __future__ import annotations

import json
import subprocess
import sys

import pytest
from toothcomb.decoders import heap

#: in a fresh process: allocate, touch and free eight 512 kB arrays, fifty times over, and count
#: the page faults of all but the first round (the memory is then the allocator's to reuse)
CHURN = r"""
import json, resource, sys
import numpy as np
from toothcomb.decoders.heap import keep_freed_memory
kept = keep_freed_memory() if sys.argv[1] == "kept" else False
def round_():
    arrays = [np.ones(1 << 16) for _ in range(8)]  # 512 kB each, every page touched
    del arrays
round_()
before = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
for _ in range(50):
    round_()
after = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
print(json.dumps({"kept": kept, "faults": after - before}))
"""


def _churn(mode: str) -> dict:
    out = subprocess.run([sys.executable, "-c", CHURN, mode], capture_output=True, text=True,
                         check=True)
    return json.loads(out.stdout)


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="glibc's allocator")
def test_freed_arrays_are_reused_instead_of_faulted_in_again() -> None:
    """With the thresholds set, memory freed at the top of the heap stays mapped: fifty rounds
    of eight 512 kB arrays fault in next to no page. With glibc's own thresholds the heap's top
    is given back after each round (more than twice the largest block freed is free there)
    and every page of the next round faults in again: 8 x 128 pages a round (4 kB pages).
    (source: the Linux man-pages project, mallopt(3), M_TRIM_THRESHOLD and M_MMAP_THRESHOLD;
    from memory)"""
    kept = _churn("kept")
    if not kept["kept"]:
        pytest.skip("not glibc: its allocator has thresholds of its own")
    default = _churn("default")
    assert kept["faults"] < 200, kept
    assert default["faults"] > 50 * 8 * 128 // 2, default  # at least half the pages again


def test_the_command_line_sets_the_thresholds_once(monkeypatch: pytest.MonkeyPatch) -> None:
    """Every command sets them before it runs; a second call does nothing."""
    from toothcomb.cli.main import main

    calls: list[int] = []
    monkeypatch.setattr(heap, "_done", None)
    monkeypatch.setattr(heap, "_set_thresholds", lambda: calls.append(1) or True)
    assert main(["version"]) == 0
    assert main(["version"]) == 0
    assert calls == [1]
    assert heap.keep_freed_memory() is True

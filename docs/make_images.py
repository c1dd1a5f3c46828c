"""Draw the example pictures of README.md ("Pictures"): one per plot kind, into docs/images/.

Run from the top of the repository (needs ``pip install -e '.[plot]'``)::

    python docs/make_images.py

Every picture is made by the ``toothcomb decode ... --plot`` command itself, from a demo capture
in captures/ or from a capture the simulator writes from one of its presets (into a temporary
folder that is removed afterwards). Nothing is edited by hand: run this again after a change to
the plots and commit the new pictures.
"""

from __future__ import annotations

import sys
import tempfile
from pathlib import Path

from toothcomb.cli.main import main

ROOT = Path(__file__).resolve().parent.parent
IMAGES = ROOT / "docs" / "images"
CAPTURES = ROOT / "captures"

#: simulator presets written to the temporary folder, under these file names
SIMULATED = {
    "after-job.h5": "belt-jumped-scope",
    "phaser-sweep.h5": "phaser-sweep-60-2-hall",
}


def pictures(tmp: Path) -> list[tuple[str, list[str]]]:
    """(picture name, ``toothcomb`` arguments before ``--plot``) for each plot kind."""
    return [
        ("waveform", ["decode", str(CAPTURES / "demo-idle-60-2.flac")]),
        ("speed", ["decode", str(CAPTURES / "demo-cranking-60-2.h5")]),
        ("strip", ["decode", str(tmp / "after-job.h5"), "--against", "demo-belt-60-2-vr"]),
        ("phase", ["decode", str(tmp / "phaser-sweep.h5")]),
        ("jitter", ["decode", str(tmp / "phaser-sweep.h5")]),
    ]


def make_images(out: Path = IMAGES) -> list[Path]:
    """Simulate the preset captures, draw every picture into ``out``, return the files."""
    out.mkdir(parents=True, exist_ok=True)
    written = []
    with tempfile.TemporaryDirectory(prefix="toothcomb-images-") as tmp_name:
        tmp = Path(tmp_name)
        for name, preset in SIMULATED.items():
            code = main(["simulate", "--preset", preset, str(tmp / name), "--quiet"])
            if code != 0:
                raise SystemExit(f"simulating {preset} failed with exit code {code}")
        for kind, args in pictures(tmp):
            target = out / f"{kind}.png"
            code = main([*args, "--plot", str(target), "--plot-kind", kind, "--force", "--quiet"])
            if code not in (0, 1):  # 1: decoded, a cam out of time (the belt picture)
                raise SystemExit(f"drawing {target} failed with exit code {code}")
            written.append(target)
    return written


if __name__ == "__main__":
    for path in make_images(Path(sys.argv[1]) if len(sys.argv) > 1 else IMAGES):
        print(
            f"{path.relative_to(ROOT) if path.is_relative_to(ROOT) else path}: "
            f"{path.stat().st_size / 1024:.0f} KiB"
        )

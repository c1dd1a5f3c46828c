"""Colours, marker shapes and line styles of every plot, in one place.

The colours are the eight of the Okabe-Ito palette, chosen to stay apart for the common forms of
colour blindness (source: M. Okabe and K. Ito, "Color Universal Design (CUD): How to make
figures and presentations that are friendly to colorblind people", 2008,
https://jfly.uni-koeln.de/color/). Colour is never the only cue: every series also has its own
marker shape and line style, and every status its own marker, so a plot printed in greyscale
still reads.

>>> series_style(0).color == OKABE_ITO["blue"], series_style(0).marker
(True, 'o')
>>> STATUS["off-by-teeth"].color == OKABE_ITO["vermillion"], STATUS["off-by-teeth"].marker
(True, 'X')
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

#: the Okabe-Ito palette, the published 0-255 RGB values written in hex
#: (source: Okabe & Ito, "Color Universal Design", 2008)
OKABE_ITO: dict[str, str] = {
    "black": "#000000",
    "orange": "#E69F00",
    "sky blue": "#56B4E9",
    "bluish green": "#009E73",
    "yellow": "#F0E442",
    "blue": "#0072B2",
    "vermillion": "#D55E00",
    "reddish purple": "#CC79A7",
}

LineStyle = str | tuple[float, tuple[float, ...]]

#: light grey for grids and other furniture
GRID = "#BBBBBB"


@dataclass(frozen=True)
class Look:
    """How one kind of mark is drawn: colour, marker shape, line style, marker size."""

    color: str
    marker: str = "o"
    #: a matplotlib line style name or an (offset, (on, off, ...)) dash pattern
    linestyle: LineStyle = "-"
    markersize: float = 5.0
    #: True: hollow marker (the edge coloured, the face white)
    hollow: bool = False

    def line_kw(self) -> dict[str, Any]:
        """Keyword arguments for ``Axes.plot``.

        >>> Look("#000000", "s", "--").line_kw()["linestyle"]
        '--'
        """
        kw: dict[str, Any] = {
            "color": self.color,
            "marker": self.marker,
            "linestyle": self.linestyle,
            "markersize": self.markersize,
        }
        if self.hollow:
            kw["markerfacecolor"] = "white"
        return kw


#: series (cam edges, cam channels) in the order they are used; yellow is left out (too light
#: on white for a line) and black is kept for the crank. Each entry differs from every other in
#: marker shape and line style, not only in colour.
SERIES: tuple[Look, ...] = (
    Look(OKABE_ITO["blue"], "o", "-"),
    Look(OKABE_ITO["orange"], "s", "--"),
    Look(OKABE_ITO["bluish green"], "^", "-."),
    Look(OKABE_ITO["reddish purple"], "D", ":"),
    Look(OKABE_ITO["sky blue"], "v", (0, (5, 1, 1, 1, 1, 1))),
    Look(OKABE_ITO["vermillion"], "P", (0, (1, 2))),
)


def series_style(i: int) -> Look:
    """The look of the ``i``-th series; after six, colours repeat with hollow markers.

    >>> series_style(6).color == series_style(0).color, series_style(6).hollow
    (True, True)
    """
    base = SERIES[i % len(SERIES)]
    if (i // len(SERIES)) % 2:
        return Look(base.color, base.marker, base.linestyle, base.markersize, hollow=True)
    return base


#: the crank signal and its teeth
CRANK = Look(OKABE_ITO["black"], "o", "-", 2.5)
#: a crank event before the wheel decoder found its first gap (tooth number not known yet)
UNSYNCED = Look(OKABE_ITO["orange"], "x", "-", 4.0)
#: a crank reference event (tooth 1): a dashed vertical line
REFERENCE = Look(OKABE_ITO["reddish purple"], "|", "--", 9.0)
#: the crank gap: a shaded band, hatched so it shows in greyscale
GAP = Look(OKABE_ITO["sky blue"], "", "-")
GAP_HATCH = "///"
#: a phaser move: a shaded band with its own hatch
MOVE = Look(OKABE_ITO["yellow"], "", "-")
MOVE_HATCH = "\\\\"
#: a phaser hold (level line) and a hold where the cam hunts
HOLD = Look(OKABE_ITO["black"], "", "--")
HUNTING = Look(OKABE_ITO["vermillion"], "", ":")
#: where an edge is expected on the 720 deg strip: a tall black bar
EXPECTED = Look(OKABE_ITO["black"], "|", "-", 16.0)
#: TDC of cylinder 1 on the strip
TDC = Look(OKABE_ITO["black"], "", ":")

#: a measured cam edge on the 720 deg strip, by its status against the expected position;
#: colour AND marker shape differ, so an edge off by teeth stands out in greyscale too
STATUS: dict[str, Look] = {
    "in-time": Look(OKABE_ITO["bluish green"], "o", "-", 9.0),
    "drifted": Look(OKABE_ITO["orange"], "D", "--", 9.0),
    "off-by-teeth": Look(OKABE_ITO["vermillion"], "X", "-", 12.0),
    # measured, but nothing to compare it with
    "measured": Look(OKABE_ITO["blue"], "s", "-", 8.0),
}

#: words for each status in the legend
STATUS_WORDS: dict[str, str] = {
    "in-time": "in time",
    "drifted": "drifted",
    "off-by-teeth": "off by whole teeth",
    "measured": "measured (nothing to compare with)",
}

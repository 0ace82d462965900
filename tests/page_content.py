"""Reading back what a written page shows: its tables (cell texts) and its PNG figures.

Tables are read with the standard library's HTML parser; PNG sizes from the IHDR chunk as the PNG
specification lays it out (ISO/IEC 15948, sec. 11.2.2: width and height, 4-byte big-endian, after
the 8-byte signature and the chunk's length and type); pixels with Matplotlib's PNG reader.
"""
from __future__ import annotations

import re
import struct
from html.parser import HTMLParser
from pathlib import Path

import numpy as np

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


class _Tables(HTMLParser):
    def __init__(self):
        super().__init__()
        self.tables: dict[str, list[list[str]]] = {}
        self._rows = None
        self._cell = None

    def handle_starttag(self, tag, attrs):
        if tag == "table":
            key = dict(attrs).get("id") or f"#{len(self.tables)}"
            self._rows = self.tables.setdefault(key, [])
        elif tag == "tr" and self._rows is not None:
            self._rows.append([])
        elif tag in ("td", "th") and self._rows is not None:
            self._cell = []

    def handle_endtag(self, tag):
        if tag in ("td", "th") and self._cell is not None:
            self._rows[-1].append(" ".join("".join(self._cell).split()))
            self._cell = None
        elif tag == "table":
            self._rows = None

    def handle_data(self, data):
        if self._cell is not None:
            self._cell.append(data)


def tables(html_text: str) -> dict[str, list[list[str]]]:
    """Every table of a page by its id (``#0``, ``#1``... for tables without one): rows of cell
    texts, the header row first."""
    p = _Tables()
    p.feed(html_text)
    p.close()
    return p.tables


def number(cell: str) -> float:
    """The first number in a cell ('35.6 g at 'tip'' -> 35.6, '–' -> nan)."""
    m = re.search(r"[-+]?\d+(\.\d*)?([eE][-+]?\d+)?", cell.replace("−", "-"))
    return float(m.group(0)) if m else float("nan")


def png_size(path: Path) -> tuple[int, int]:
    """(width, height) of a PNG file."""
    data = Path(path).read_bytes()[:24]
    assert data[:8] == PNG_SIGNATURE and data[12:16] == b"IHDR", path
    return struct.unpack(">II", data[16:24])


def ink(path: Path) -> tuple[float, float]:
    """Fractions of a PNG's pixels that are not near-white (anything drawn) and that are coloured
    (curves, bars, markers: channels differing by more than 0.3), each in [0, 1]."""
    from matplotlib.image import imread

    rgb = imread(str(path))[..., :3]
    drawn = np.any(rgb < 0.95, axis=-1).mean()
    coloured = ((rgb.max(axis=-1) - rgb.min(axis=-1)) > 0.3).mean()
    return float(drawn), float(coloured)

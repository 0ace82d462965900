"""HTML pages from the Jinja2 templates shipped in ``report/templates/`` (package data).

Code computes the numbers and draws the figures; the templates lay them out.  Every page extends
``base.html``, which carries the styles and the caution (top and bottom), so the caution is
written once.  Autoescaping is on for every template: values reach the page as text, never as
markup, and a template that asks for a value it was not given fails (``StrictUndefined``) instead
of printing nothing.

Tables whose layout is the same everywhere (a header row, then rows of cells) go through
:class:`Table` and the ``table`` macro of ``macros.html``; a cell is a string, or a :class:`Cell`
for a colour swatch or code type.
"""
from __future__ import annotations

import functools
from dataclasses import dataclass
from typing import Sequence

from ..analysis.linear import CAUTION

__all__ = ["Cell", "Table", "render_page"]


@dataclass(frozen=True)
class Cell:
    """A table cell with more than text.

    Attributes
    ----------
    text : str
    swatch : str, optional
        CSS colour of a small square before the text (which build a row belongs to).
    code : bool
        Set the text in code type (hashes, folder names).
    """

    text: str = ""
    swatch: str | None = None
    code: bool = False


@dataclass(frozen=True)
class Table:
    """A table for the ``table`` macro: header cells, then rows of cells (str or :class:`Cell`).

    Attributes
    ----------
    head : sequence of str
    rows : sequence of sequence of (str or Cell)
    cls : str
        CSS class of the table (``"wide"`` sets it smaller).
    id : str
        HTML id of the table (for links and for tests that read it back).
    """

    head: Sequence
    rows: Sequence
    cls: str = ""
    id: str = ""


@functools.lru_cache(maxsize=1)
def _environment():
    from jinja2 import Environment, PackageLoader, StrictUndefined

    env = Environment(loader=PackageLoader(__package__, "templates"), autoescape=True,
                      undefined=StrictUndefined, trim_blocks=True, lstrip_blocks=True,
                      keep_trailing_newline=True)
    env.globals["caution"] = CAUTION
    return env


def render_page(template: str, **context) -> str:
    """The HTML text of ``template`` (a file name in ``report/templates/``) with ``context``."""
    return _environment().get_template(template).render(**context)

"""Report pages: A4 landscape figures with a title, flowing text, tables and a footer.

Text is wrapped to the page and continues on a new page when it runs out; tables are drawn with
:meth:`matplotlib.axes.Axes.table` and split over pages by rows, the header repeated. Footers are
added once every page exists (:func:`add_footers`), so they can say "page i of n" and, for
simulated readings, "synthetic data".
"""

from __future__ import annotations

import textwrap
from collections.abc import Callable, Sequence

from matplotlib.axes import Axes
from matplotlib.figure import Figure
from matplotlib.lines import Line2D

PAGE = (11.69, 8.27)
"""A4 landscape, inches."""
TOP = 0.90
BOTTOM = 0.08
LEFT = 0.05
TEXT_SIZE = 9.0
LINE = 0.024          # height of a text line, fraction of the page
CHARS = 150           # characters per full-width line at TEXT_SIZE


def new_page(title: str) -> Figure:
    """An empty page with its title."""
    fig = Figure(figsize=PAGE)
    fig.text(LEFT, 0.955, title, fontsize=15, weight="bold", va="top")
    return fig


class TextFlow:
    """Headings and paragraphs flowing down pages of one title."""

    def __init__(self, title: str, pages: list[Figure] | None = None, *,
                 top: float = TOP) -> None:
        self.title = title
        self.pages: list[Figure] = pages if pages is not None else []
        self.fig = new_page(title) if not self.pages else self.pages[-1]
        if not self.pages:
            self.pages.append(self.fig)
        self.y = top

    def _room(self, need: float) -> None:
        if self.y - need < BOTTOM:
            self.fig = new_page(self.title + " (continued)")
            self.pages.append(self.fig)
            self.y = TOP

    def height(self, text: str, *, size: float = TEXT_SIZE, width: int = CHARS,
               weight: str = "normal") -> float:
        """Height :meth:`paragraph` will take for ``text``, fraction of the page."""
        chars = int(width * TEXT_SIZE / size * (0.9 if weight == "bold" else 1.0))
        n = len(textwrap.wrap(text, chars) or [""])
        return n * LINE * size / TEXT_SIZE + 0.3 * LINE

    def heading(self, text: str) -> None:
        """A bold heading (kept with at least two lines after it)."""
        self._room(3 * LINE)
        self.fig.text(LEFT, self.y, text, fontsize=11, weight="bold", va="top")
        self.y -= 1.3 * LINE

    def paragraph(self, text: str, *, size: float = TEXT_SIZE, indent: float = 0.0,
                  width: int = CHARS, weight: str = "normal") -> None:
        """A wrapped paragraph."""
        chars = int(width * TEXT_SIZE / size * (0.9 if weight == "bold" else 1.0))
        for part in textwrap.wrap(text, chars) or [""]:
            self._room(LINE * size / TEXT_SIZE)
            self.fig.text(LEFT + 0.01 + indent, self.y, part, fontsize=size, va="top",
                          weight=weight)
            self.y -= LINE * size / TEXT_SIZE
        self.y -= 0.3 * LINE

    def bullets(self, items: Sequence[str]) -> None:
        """Paragraphs with a leading dash."""
        for item in items:
            lines = textwrap.wrap(item, CHARS - 4) or [""]
            self._room(LINE * len(lines[:2]))
            for i, part in enumerate(lines):
                self._room(LINE)
                self.fig.text(LEFT + 0.01, self.y, ("- " if i == 0 else "  ") + part,
                              fontsize=TEXT_SIZE, va="top")
                self.y -= LINE
        self.y -= 0.3 * LINE

    def code(self, lines: Sequence[str], *, size: float = 7.5) -> None:
        """Lines of fixed-width text (e.g. TOML), split over pages as needed."""
        step = LINE * size / TEXT_SIZE * 0.95
        block: list[str] = []
        start = self.y
        for line in lines:
            if self.y - step < BOTTOM:
                self.fig.text(LEFT + 0.01, start, "\n".join(block), fontsize=size, va="top",
                              family="monospace", linespacing=1.25)
                block = []
                self.fig = new_page(self.title + " (continued)")
                self.pages.append(self.fig)
                self.y = start = TOP
            block.append(line)
            self.y -= step
        if block:
            self.fig.text(LEFT + 0.01, start, "\n".join(block), fontsize=size, va="top",
                          family="monospace", linespacing=1.25)
        self.y -= 0.3 * LINE

    def space(self, lines: float = 0.5) -> None:
        """Vertical space."""
        self.y -= lines * LINE


def figure_page(title: str, draw: Callable[[Axes], object], note: str = "") -> Figure:
    """A page holding one plot drawn by ``draw(ax)`` (any plot function taking ``ax``)."""
    fig = new_page(title)
    ax = fig.add_axes((LEFT + 0.03, BOTTOM + 0.10, 0.86, TOP - BOTTOM - 0.16))
    draw(ax)
    if note:
        fig.text(LEFT, BOTTOM + 0.03, note, fontsize=8, va="bottom", color="0.2")
    return fig


def table_pages(title: str, header: Sequence[str], rows: Sequence[Sequence[str]], *,
                col_widths: Sequence[float] | None = None, notes: Sequence[str] = (),
                rows_per_page: int = 24, font_size: float = 8.0) -> list[Figure]:
    """A typeset table over as many pages as its rows need (header on each).

    Parameters
    ----------
    title : str
        Page title.
    header : sequence of str
        Column headings (units in brackets).
    rows : sequence of sequence of str
        Cells, already formatted.
    col_widths : sequence of float, optional
        Relative column widths (default equal).
    notes : sequence of str
        Paragraphs under the table on its last page (sources, meanings of flags).
    rows_per_page : int
        Rows per page.
    font_size : float
        Cell font size, pt.

    Returns
    -------
    list of Figure
    """
    rows = [list(r) for r in rows] or [["(none)"] + [""] * (len(header) - 1)]
    chunks = [rows[i:i + rows_per_page] for i in range(0, len(rows), rows_per_page)]
    widths = list(col_widths) if col_widths else [1.0] * len(header)
    total = sum(widths)
    widths = [w / total for w in widths]
    pages: list[Figure] = []
    for k, chunk in enumerate(chunks):
        fig = new_page(title + (" (continued)" if k else ""))
        n_lines = len(chunk) + 1
        height = min(0.032 * n_lines, TOP - BOTTOM - (0.05 + 0.03 * len(notes)
                                                     if k == len(chunks) - 1 else 0.0))
        ax = fig.add_axes((LEFT, TOP - height, 1 - 2 * LEFT, height))
        ax.axis("off")
        tab = ax.table(cellText=chunk, colLabels=list(header), colWidths=widths,
                       loc="upper left", cellLoc="left", colLoc="left", bbox=(0, 0, 1, 1))
        tab.auto_set_font_size(False)
        tab.set_fontsize(font_size)
        for (r, _c), cell in tab.get_celld().items():
            cell.set_linewidth(0.4)
            cell.set_edgecolor("0.6")
            if r == 0:
                cell.set_facecolor("0.88")
                cell.get_text().set_weight("bold")
            elif r % 2 == 0:
                cell.set_facecolor("0.96")
        if k == len(chunks) - 1 and notes:
            flow = TextFlow(title, [fig], top=TOP - height - 0.03)
            for note in notes:
                flow.paragraph(note, size=8.0)
            pages.extend(flow.pages)
        else:
            pages.append(fig)
    return pages


def add_footers(pages: Sequence[Figure], left: str, *, synthetic: bool,
                caution: str) -> None:
    """Footer on every page: what the report is, the caution, page i of n, synthetic data.

    Parameters
    ----------
    pages : sequence of Figure
        All pages, in order.
    left : str
        Report identity (drive, shift).
    synthetic : bool
        The readings were simulated: every footer says "synthetic data" in bold.
    caution : str
        One short line of caution.
    """
    n = len(pages)
    for i, fig in enumerate(pages, start=1):
        fig.add_artist(_rule(fig))
        fig.text(LEFT, 0.045, left, fontsize=7.5, va="top")
        right = f"page {i} of {n}"
        if synthetic:
            fig.text(1 - LEFT - 0.07, 0.045, "SYNTHETIC DATA", fontsize=8.5, va="top",
                     ha="right", weight="bold")
        fig.text(1 - LEFT, 0.045, right, fontsize=7.5, va="top", ha="right")
        fig.text(LEFT, 0.025, caution + (" Synthetic data: simulated readings, not "
                                         "measurements." if synthetic else ""),
                 fontsize=7, va="top", color="0.25")


def _rule(fig: Figure) -> Line2D:
    return Line2D([LEFT, 1 - LEFT], [0.058, 0.058], transform=fig.transFigure, lw=0.5,
                  color="0.5")


__all__ = ["PAGE", "TextFlow", "new_page", "figure_page", "table_pages", "add_footers"]

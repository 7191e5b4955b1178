"""Notebook explorer of the moving section (ipywidgets on top of :mod:`tbminv.plots.section`).

:class:`SectionExplorer` shows the section ahead of the face at the advance chosen on a slider,
a toggle for fading the cells the data do not constrain, a chainage slider with the
resistivity history of that chainage as the face approached, and the data fit with the chosen
advance marked. All drawing is done by :mod:`tbminv.plots.section`; the explorer renders the figures
to PNG into :class:`ipywidgets.Image` views, so it needs no interactive matplotlib backend and
its callbacks run (and are tested) without a browser.

The explorer fits a notebook column of :data:`COLUMN_WIDTH_PX` pixels (a JupyterLab output
area is about 960 px wide in a 1400 px window): every row's declared widths add up to at most
that (:meth:`SectionExplorer.row_widths_px`), and each figure is drawn at the pixel size of
its view, so no view is scaled or cut.

Where widgets are not rendered (a static notebook view, a plain terminal), the explorer's
display falls back to a PNG of the current figures, and :func:`explore` with ``static=True``
(the default outside a Jupyter kernel) returns the static figures instead.
"""

from __future__ import annotations

import base64
import io
import logging
from typing import Any

import numpy as np
import xarray as xr
from matplotlib.figure import Figure

from tbminv.plots import section as figures

_LOG = logging.getLogger(__name__)

#: Width of the notebook column the explorer fits, px.
COLUMN_WIDTH_PX = 940
#: Room left for each view's margins and the gap between side-by-side views, px.
MARGIN_PX = 10
#: Heights of the section view and of the bottom row's views, px.
SECTION_HEIGHT_PX = 330
BOTTOM_HEIGHT_PX = 300
#: Width of the slider and check-box labels, px (the whole label shows, nothing cut).
LABEL_WIDTH_PX = 110


def _png(fig: Figure, dpi: int = 80) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi)
    return buf.getvalue()


def _in_kernel() -> bool:
    try:  # IPython is optional and heavy: imported only when asked
        from IPython import get_ipython
    except ImportError:  # pragma: no cover
        return False
    ip = get_ipython()
    return ip is not None and getattr(ip, "kernel", None) is not None


class SectionExplorer:
    """Sliders over advances and chainages of a section, drawn with :mod:`tbminv.plots.section`.

    Parameters
    ----------
    ds : xarray.Dataset
        Section (machine frame) from :func:`tbminv.results.store.open_section`.
    dpi : int
        Resolution of the rendered figures, pixels per inch (a figure's size in inches is its
        view's pixel size over ``dpi``: a higher ``dpi`` gives larger lettering, not wider views).
    width_px : int
        Width of the notebook column the explorer fits, px.

    Attributes
    ----------
    advance, mask, chainage : ipywidgets
        The controls (a selection slider over advance numbers, a check box, a float slider
        in m).
    section_view, history_view, fit_view : ipywidgets.Image
        The rendered figures.
    widget : ipywidgets.VBox
        Everything, for display; ``rows`` holds its rows (controls, section, chainage slider,
        history and data fit side by side).
    view_px : dict
        Pixel size (width, height) of the ``section``, ``history`` and ``fit`` views.
    renders : int
        Number of redraws so far.
    """

    def __init__(self, ds: xr.Dataset, *, dpi: int = 80,
                 width_px: int = COLUMN_WIDTH_PX) -> None:
        import ipywidgets as w  # optional (notebook extra): imported only for the explorer

        self.ds = ds
        self.dpi = dpi
        self.width_px = int(width_px)
        half = (self.width_px - 2 * MARGIN_PX) // 2        # two views side by side
        self.view_px = {"section": (self.width_px - MARGIN_PX, SECTION_HEIGHT_PX),
                        "history": (half, BOTTOM_HEIGHT_PX),
                        "fit": (half, BOTTOM_HEIGHT_PX)}
        label = {"description_width": f"{LABEL_WIDTH_PX}px"}
        self.norm = figures.resistivity_norm(ds)
        advs = [int(a) for a in ds["advance"].values]
        ahead = ds["ahead"].values
        faces = ds["face_chainage_m"].values
        x0 = float(np.nanmin(faces))
        x1 = float(np.nanmax(faces) + ahead[-1])
        step = float(np.min(np.diff(ahead)))
        start = float(faces[-1] + min(10.0, ahead[-1] / 2))
        self.advance = w.SelectionSlider(options=advs, value=advs[-1], description="advance",
                                         continuous_update=False, style=label,
                                         layout=w.Layout(width=f"{half}px"))
        self.mask = w.Checkbox(value=True, description="fade cells the data do not constrain",
                               indent=False, layout=w.Layout(width=f"{half}px"))
        self.chainage = w.FloatSlider(value=min(max(start, x0), x1), min=x0, max=x1, step=step,
                                      description="chainage (m)", continuous_update=False,
                                      readout_format=".1f", style=label,
                                      layout=w.Layout(width=f"{self.width_px - MARGIN_PX}px"))
        self.section_view, self.history_view, self.fit_view = (
            w.Image(format="png", layout=w.Layout(width=f"{self.view_px[k][0]}px",
                                                  height=f"{self.view_px[k][1]}px"))
            for k in ("section", "history", "fit"))
        self.renders = 0
        self.advance.observe(self._on_advance, names="value")
        self.mask.observe(self._on_mask, names="value")
        self.chainage.observe(self._on_chainage, names="value")
        self.rows = [w.HBox([self.advance, self.mask]), self.section_view, self.chainage,
                     w.HBox([self.history_view, self.fit_view])]
        self.widget = w.VBox(self.rows, layout=w.Layout(width=f"{self.width_px}px"))
        self.render()

    def row_widths_px(self) -> list[int]:
        """Declared width of each row of the explorer, px: its views' widths plus a margin each.

        Every entry is at most :attr:`width_px` when the explorer fits its column.
        """
        def px(widget: Any) -> int:
            return int(str(widget.layout.width).removesuffix("px")) + MARGIN_PX

        return [sum(px(c) for c in row.children) if hasattr(row, "children") else px(row)
                for row in self.rows]

    def _axes(self, view: str) -> Any:
        """New axes on a figure of the pixel size of ``view`` at :attr:`dpi`."""
        w_px, h_px = self.view_px[view]
        fig = Figure(figsize=(w_px / self.dpi, h_px / self.dpi), dpi=self.dpi,
                     layout="constrained")
        return fig.add_subplot()

    # figures --------------------------------------------------------------------------
    def section_figure(self) -> Figure:
        """The section ahead of the face at the chosen advance."""
        return figures.plot_section_ahead(self.ds, self.advance.value, self._axes("section"),
                                          mask=self.mask.value, norm=self.norm)

    def history_figure(self) -> Figure:
        """Resistivity history of the chosen chainage; the chosen advance marked."""
        fig = figures.plot_chainage_history(self.ds, float(self.chainage.value),
                                            self._axes("history"), mask=self.mask.value)
        face = float(self.ds["face_chainage_m"].sel(advance=self.advance.value))
        fig.axes[0].axvline(float(self.chainage.value) - face, color="C1", lw=1.2, alpha=0.7)
        return fig

    def fit_figure(self) -> Figure:
        """Data fit per advance with the chosen advance marked."""
        return figures.plot_data_fit(self.ds, self._axes("fit"), highlight=self.advance.value)

    def static_figures(self) -> list[Figure]:
        """The three current figures (for static output)."""
        return [self.section_figure(), self.history_figure(), self.fit_figure()]

    # callbacks ------------------------------------------------------------------------
    def render(self, which: tuple[str, ...] = ("section", "history", "fit")) -> None:
        """Redraw the named views."""
        if "section" in which:
            self.section_view.value = _png(self.section_figure(), self.dpi)
        if "history" in which:
            self.history_view.value = _png(self.history_figure(), self.dpi)
        if "fit" in which:
            self.fit_view.value = _png(self.fit_figure(), self.dpi)
        self.renders += 1

    def _on_advance(self, change: dict[str, Any]) -> None:
        self.render(("section", "history", "fit"))

    def _on_mask(self, change: dict[str, Any]) -> None:
        self.render(("section", "history"))

    def _on_chainage(self, change: dict[str, Any]) -> None:
        self.render(("history",))

    # display --------------------------------------------------------------------------
    def _repr_mimebundle_(self, **kwargs: Any) -> dict[str, Any]:
        bundle = dict(self.widget._repr_mimebundle_(**kwargs) or {})
        # a static view that cannot render widgets shows the current section as PNG
        bundle["image/png"] = base64.b64encode(self.section_view.value).decode("ascii")
        bundle["text/plain"] = (f"SectionExplorer: advances {self.advance.options[0]}-"
                                f"{self.advance.options[-1]} (widgets not rendered here: "
                                "see the PNG, or use tbminv.plots.section)")
        return bundle


def explore(ds: xr.Dataset, *, static: bool | None = None) -> SectionExplorer | list[Figure]:
    """The explorer in a Jupyter kernel, else (or with ``static=True``) the static figures.

    Parameters
    ----------
    ds : xarray.Dataset
        Section (machine frame).
    static : bool, optional
        Force static figures (True) or widgets (False); default: widgets in a Jupyter kernel.

    Returns
    -------
    SectionExplorer or list of Figure
        The explorer (display it) or [section ahead at the last advance, moving section,
        ahead profile, data fit].
    """
    if static is None:
        static = not _in_kernel()
    if not static:
        try:
            return SectionExplorer(ds)
        except ImportError:  # pragma: no cover - ipywidgets is a dependency
            _LOG.warning("ipywidgets not available: static figures instead")
    return [figures.plot_section_ahead(ds), figures.plot_moving_section(ds),
            figures.plot_ahead_profile(ds), figures.plot_data_fit(ds)]


__all__ = ["COLUMN_WIDTH_PX", "SectionExplorer", "explore"]

"""Widget explorer without a browser (invented section): callbacks, layout width, axis labels."""

from __future__ import annotations

import pytest
from matplotlib.figure import Figure

from tbminv.plots.section import plot_chainage_history, plot_data_fit
from tbminv.widgets import COLUMN_WIDTH_PX, SectionExplorer, explore
from tests.helpers import make_section


@pytest.fixture(scope="module")
def ds():
    return make_section(range(8), rho_beyond=12.0, noise_log10=0.01, flagged=(3,))


def test_slider_mask_and_chainage_update_the_figures(ds):
    ex = SectionExplorer(ds, dpi=40)
    sec0, hist0, fit0 = (ex.section_view.value, ex.history_view.value, ex.fit_view.value)
    assert sec0[:8] == b"\x89PNG\r\n\x1a\n" and ex.renders == 1
    ex.advance.value = 2
    assert ex.renders == 2
    assert ex.section_view.value != sec0 and ex.fit_view.value != fit0
    assert "advance 2" in ex.section_figure().axes[0].get_title()
    sec1, hist1 = ex.section_view.value, ex.history_view.value
    ex.mask.value = False
    assert ex.section_view.value != sec1
    # without the mask the "hatched" note is gone from the section figure
    assert not any("hatched" in t.get_text() for t in ex.section_figure().axes[0].texts)
    hist2 = ex.history_view.value
    ex.chainage.value = ex.chainage.min + 2.0
    assert ex.history_view.value != hist2
    assert f"{ex.chainage.value:.1f}" in ex.history_figure().axes[0].get_title()
    assert hist1 != hist0  # the marker of the chosen advance moved in the history figure


def test_flagged_advance_is_marked(ds):
    ex = SectionExplorer(ds, dpi=40)
    ex.advance.value = 3
    assert "FLAGGED" in ex.section_figure().axes[0].get_title()


def test_static_fallback(ds):
    figs = explore(ds, static=True)
    assert len(figs) == 4 and all(isinstance(f, Figure) for f in figs)
    ex = explore(ds, static=False)
    bundle = ex._repr_mimebundle_()
    assert "image/png" in bundle and "text/plain" in bundle
    assert "application/vnd.jupyter.widget-view+json" in bundle


def _png_size(data: bytes) -> tuple[int, int]:
    """Width and height of a PNG from its IHDR chunk (PNG specification, W3C 2003, sec. 11.2.2)."""
    assert data[:8] == b"\x89PNG\r\n\x1a\n" and data[12:16] == b"IHDR"
    return int.from_bytes(data[16:20], "big"), int.from_bytes(data[20:24], "big")


@pytest.mark.parametrize("width_px", [COLUMN_WIDTH_PX, 700])
def test_explorer_fits_a_notebook_column(ds, width_px):
    # a JupyterLab output area in a 1400 px browser window is about 960 px wide (measured once
    # in headless Chromium with this project's notebook; 968 px)
    assert COLUMN_WIDTH_PX <= 960
    ex = SectionExplorer(ds, width_px=width_px)
    rows = ex.row_widths_px()
    assert len(rows) == 4 and max(rows) <= width_px
    # history and data fit side by side, both whole: each view is drawn at its declared size
    for name, view in (("section", ex.section_view), ("history", ex.history_view),
                       ("fit", ex.fit_view)):
        w_px, h_px = _png_size(view.value)
        assert (f"{w_px}px", f"{h_px}px") == (view.layout.width, view.layout.height), name
        assert (w_px, h_px) == ex.view_px[name]
    assert ex.view_px["history"][0] + ex.view_px["fit"][0] <= width_px


def test_slider_labels_fit_their_label_width(ds):
    # the label text at JupyterLab's widget font size, 13 px (from memory), measured with
    # matplotlib's text layout in DejaVu Sans (wider than the browsers' default sans-serif
    # fonts): no label is cut ("chainage …")
    from matplotlib.font_manager import FontProperties
    from matplotlib.textpath import TextPath

    ex = SectionExplorer(ds, dpi=40)
    for slider in (ex.advance, ex.chainage):
        width = TextPath((0, 0), slider.description, size=13,
                         prop=FontProperties(family="DejaVu Sans")).get_extents().width
        declared = float(slider.style.description_width.removesuffix("px"))
        assert width + 8 <= declared, slider.description


@pytest.mark.parametrize("ylim", [(60.0, 90.0), (31.0, 48.0), (12.0, 19.0), (120.0, 190.0),
                                  (15.0, 300.0), (0.3, 0.9)])
def test_history_resistivity_axis_shows_numbers(ds, ylim):
    # a log axis that holds no power of ten and no 2 or 5 x 10^n must still carry numbers
    fig = plot_chainage_history(ds, float(ds["face_chainage_m"][-1]) + 5.0)
    ax = fig.axes[0]
    ax.set_ylim(*ylim)
    fig.canvas.draw()
    shown = [t.get_text() for t in ax.yaxis.get_majorticklabels() + ax.yaxis.get_minorticklabels()
             if t.get_text() and ylim[0] <= t.get_position()[1] <= ylim[1]]
    assert len(shown) >= 2, shown
    assert all("e" not in s for s in shown)   # plain numbers, not powers of ten


def test_advance_axis_has_whole_numbers(ds):
    fig = plot_data_fit(ds.isel(advance=slice(0, 3)))
    ax = fig.axes[0]
    fig.canvas.draw()
    lo, hi = ax.get_xlim()
    ticks = [t for t in ax.get_xticks() if lo <= t <= hi]
    assert len(ticks) >= 2 and all(float(t).is_integer() for t in ticks), ticks

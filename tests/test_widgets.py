"""Widget explorer callbacks without a browser (invented section: plumbing test)."""

from __future__ import annotations

import pytest
from matplotlib.figure import Figure

from tbminv.widgets import SectionExplorer, explore
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

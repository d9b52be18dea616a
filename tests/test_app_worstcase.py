"""The worst-case view: it runs core's search in a background task, shows core's numbers, and
drops a result when the text changes."""

import numpy as np
import pytest

from core.analyses.worstcase import fragile_chunks
from core.engine.text import demo_text

WAIT = 120_000


def test_the_worst_case_view_shows_cores_numbers_and_drops_stale_ones(window, qtbot):
    wb = window.workbench
    assert wb.set_text(demo_text()[3000:3800], "a slice of the demo text")
    qtbot.waitUntil(lambda: wb.entries and all(e.ready for e in wb.entries.values()), timeout=WAIT)
    tolerant = next(p for p, e in wb.entries.items() if e.name == "tolerant")
    wb.select(tolerant)
    window.show_view("worstcase")
    panel = window.panels["worstcase"]
    assert panel.run()
    qtbot.waitUntil(lambda: panel.result is not None and not panel.busy(), timeout=WAIT)
    result = panel.result
    assert result.chunks.text_sha256 == wb.text_sha and result.provenance["codec"]["name"] == "tolerant"
    rows = fragile_chunks(result, 60)
    assert panel.table.rowCount() == len(rows) > 0
    shown = float(panel.table.item(0, 2).text())
    assert shown == pytest.approx(min(r.relative_radius for r in rows), rel=1e-2)  # sorted by radius, relative units first
    assert "verified" in panel.summary.text() and panel.text.shown_text().startswith(result.chunks.text[:20])

    panel.units.setCurrentIndex(1)  # absolute units: the same result, redrawn
    assert panel.result is result
    assert float(panel.table.item(0, 2).text()) == pytest.approx(np.nanmin(result.radius), rel=1e-2)

    assert wb.set_text(demo_text()[4000:4400], "another slice")
    qtbot.waitUntil(lambda: all(e.ready for e in wb.entries.values()), timeout=WAIT)
    assert panel.result is None and panel.table.rowCount() == 0  # nothing computed on the old text is shown


def test_a_result_where_every_search_failed_is_drawn_not_raised(window, qtbot, tokenizer):
    """Every chunk failed (a decoder that ignores z: no gradient, so no boundary): core's summary has no
    median (None), and the view says so instead of raising inside its slot (common practice: '—' for none)."""
    import torch

    from core.analyses.worstcase import worst_case
    from tests.test_core_worstcase import linear_setup

    codec, chunks, encoded = linear_setup(tokenizer, n=40)
    codec.W = torch.zeros_like(codec.W)  # logits = b whatever z is: nothing ever flips
    result = worst_case(codec, chunks, encoded=encoded)
    assert result.failed == result.num_chunks and result.summary()["relative_radius_median"] is None
    panel = window.panels["worstcase"]
    qtbot.waitUntil(lambda: panel._key() is not None, timeout=WAIT)
    panel.results[panel._key()] = result
    panel.refresh()
    assert panel.result is result
    assert f"0 of {result.num_chunks:,} chunks verified" in panel.summary.text() and "median worst case —" in panel.summary.text()
    assert panel.table.rowCount() == 0

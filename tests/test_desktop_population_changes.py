"""The grown-and-shrunk table of the Populations panel (pytest-qt, offscreen)."""

from __future__ import annotations

import numpy as np
import pytest

pytest.importorskip("pytestqt")

from core.populations import population_changes  # noqa: E402
from desktop.panels.populations import PopulationsPanel  # noqa: E402


def test_the_largest_labelled_change_is_the_first_row(qtbot):
    # three populations: 0 unchanged, 1 shares the loss when 2 grows ten-fold (significant,
    # fold ~0.9: not labelled), 2 grows ten-fold (labelled grown)
    rng = np.random.default_rng(11)
    control = rng.choice([0, 1, 2], size=20000, p=[0.30, 0.69, 0.01])
    test = rng.choice([0, 1, 2], size=20000, p=[0.30, 0.60, 0.10])
    rows = population_changes(control, test, 3)
    for r in rows:
        r["short_profile"] = f"pop {r['id']}"
    panel = PopulationsPanel()
    qtbot.addWidget(panel)
    panel.show_populations(None, rows)
    assert not panel.changes.isHidden() and panel.changes.rowCount() == 3
    header = [panel.changes.horizontalHeaderItem(c).text() for c in range(panel.changes.columnCount())]
    assert header[:3] == ["Markers", "Change", "Fold (95 %)"]    # what changed, readable without scrolling
    first = [panel.changes.item(0, c).text() for c in range(3)]
    assert first[0] == "pop 2" and first[1] == "grown" and first[2].startswith(f"{rows[2]['fold']:.2f}")
    # population 1's shrinkage is significant but below the change fold: shown, not labelled
    assert rows[1]["q"] < 0.01 and panel.changes.item(1, 0).text() == "pop 1" and panel.changes.item(1, 1).text() == ""
    panel.show_populations(None, None)
    assert panel.changes.isHidden()

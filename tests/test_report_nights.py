"""The page across the nights of a mosaic (pipeline.report._nights), on synthetic nights."""

from __future__ import annotations

import re

import _report_scene as scene
import numpy as np
import pytest
from astropy.table import Table

from pipeline.report import (
    NIGHTS_FIGURES,
    pooled_residuals,
)
from pipeline.report._nights import seeing_over_nights_figure, zero_point_over_nights_figure


def _images(page: str) -> list[str]:
    return re.findall(r'<img src="data:image/png;base64,[^"]+" alt="([^"]*)"', page)


def test_one_row_per_night_with_its_summary_and_a_link_to_its_page():
    page = scene.nights_page()
    table = page[page.index('<table class="nights">') :]
    rows = re.findall(r"<tr><th>(<a .*?)</th>(.*?)</tr>", table)
    assert [name for name, _ in rows] == [
        '<a href="../2026-10-15/page.html">2026-10-15</a>',
        '<a href="../2026-10-16/page.html">2026-10-16</a>',
    ]
    # The summary's values sit under their labels: the synthetic night has 2 blocks.
    header = re.search(r'<table class="nights"><tr>(.*?)</tr>', page).group(1)
    labels = re.findall(r"<th>(.*?)</th>", header)
    cells = re.findall(r"<td>(.*?)</td>", rows[0][1])
    assert labels[0] == "night" and cells[labels.index("blocks") - 1] == "2"
    assert _images(page) == [spec.title for spec in NIGHTS_FIGURES]
    assert "Every night has every product of this page." in page


def test_text_from_a_night_is_escaped():
    entries = scene.nights(("<b>night</b>", "ok"))
    entries[0][1]["summary"].append(["<script>x</script>", "<i>1</i>"])
    page = scene.nights_page(entries)
    assert "<b>night</b>" not in page and "&lt;b&gt;night&lt;/b&gt;" in page
    assert "<script>" not in page and "&lt;i&gt;1&lt;/i&gt;" in page


def test_a_night_without_a_product_is_left_out_of_that_figure_and_said_so():
    entries = scene.nights()
    del entries[1][1]["zero_point"]  # e.g. its zeropoint stage failed
    page = scene.nights_page(entries)
    assert "2026-10-16: no zero_point or block_index; left out of" in page
    assert len(_images(page)) == len(NIGHTS_FIGURES)  # drawn with the other night
    for _, products in entries:
        del products["residual_grid"]
    page = scene.nights_page(entries)
    assert "Not drawn: no night has the products it needs." in page
    assert len(_images(page)) == len(NIGHTS_FIGURES) - 1


def test_each_night_is_drawn_with_its_own_values():
    entries = scene.nights()
    figure = seeing_over_nights_figure(entries)
    lines = figure.axes[0].get_lines()
    assert [line.get_label() for line in lines] == ["2026-10-15", "2026-10-16"]
    # The whole-stretch rows of the synthetic seeing: 3.0 and 3.4 px, the
    # second night 1.2 times worse (scene.nights).
    np.testing.assert_allclose(lines[0].get_ydata(), [3.0, 3.4])
    np.testing.assert_allclose(lines[1].get_ydata(), [3.6, 4.08])
    figure = zero_point_over_nights_figure(entries)
    first, second = (line.get_ydata() for line in figure.axes[0].get_lines())
    np.testing.assert_allclose(first - second, 0.1)


def test_pooled_residuals_weight_each_cell_by_its_stars():
    # Two cells, 1 and 3 stars: mean (1 * 4 + 3 * 0) / 4 = 1; rms
    # sqrt((1 * 3^2 + 3 * 1^2) / 4) = sqrt(3).  An empty cell's NaN is ignored.
    grid = Table(
        {
            "across": [0, 0, 0],
            "along": [0, 1, 2],
            "n": [1, 3, 0],
            "mean_along": [4.0, 0.0, np.nan],
            "mean_across": [-2.0, 2.0, np.nan],
            "rms_along": [3.0, 1.0, np.nan],
            "rms_across": [1.0, 1.0, np.nan],
        }
    )
    pooled = pooled_residuals(grid)
    assert pooled["mean_along"] == pytest.approx(1.0)
    assert pooled["mean_across"] == pytest.approx(1.0)
    assert pooled["rms_along"] == pytest.approx(np.sqrt(3.0))
    assert pooled["rms_across"] == pytest.approx(1.0)

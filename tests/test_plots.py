"""The briefing's matplotlib figures rendered off-screen: not blank, drawing the numbers
they claim (references: the reliability table, scikit-learn's ROC area), text written as
matplotlib's own renderer writes it, pyplot never loaded, no store taken. The report's
maps are SVG (tests/test_svg_maps.py)."""

import io
import subprocess
import sys

import matplotlib.colors
import matplotlib.image
import numpy as np
import pytest
from sklearn.metrics import roc_auc_score

from analogs.presentation import figures as plots
from analogs.stages.hindcast import leave_one_year_out
from analogs.stages.scores import reliability_table, roc_curve_points

#: Least variance of the RGBA pixel values (0-255) of a figure with content; a blank
#: white canvas has 0, a figure with only a title about 10 (measured here).
MIN_PIXEL_VARIANCE = 200.0


def pixels(figure) -> np.ndarray:
    figure.canvas.draw()
    return np.asarray(figure.canvas.buffer_rgba(), dtype=float)


def assert_not_blank(figure):
    assert pixels(figure).var() > MIN_PIXEL_VARIANCE
    png = plots.figure_png(figure)
    assert png[:8] == b"\x89PNG\r\n\x1a\n"
    image = matplotlib.image.imread(io.BytesIO(png), format="png")
    assert image.var() * 255.0 ** 2 > MIN_PIXEL_VARIANCE


def test_blank_figure_fails_the_check():
    """The blankness threshold separates an empty canvas from a drawn one."""
    empty = plots.new_figure(4, 3)
    assert pixels(empty).var() < MIN_PIXEL_VARIANCE


@pytest.fixture(scope="module")
def hindcast(demo_store):
    return leave_one_year_out(demo_store.pcs.values, demo_store.times, demo_store.observed(),
                              months=[5, 6, 7, 8, 9])


def test_reliability_diagram(hindcast):
    table = reliability_table(hindcast["forecast"], hindcast["observed"])
    figure = plots.reliability_diagram(table, title_suffix="May-Sep")
    assert_not_blank(figure)
    assert len(figure.axes) == 2
    top, bottom = figure.axes
    assert "Reliability" in top.get_title() and "May-Sep" in top.get_title()
    line = [drawn for drawn in top.get_lines() if drawn.get_label() == "hindcast"][0]
    np.testing.assert_allclose(line.get_ydata(), [b["observed_frequency"] for b in table])
    assert [p.get_height() for p in bottom.patches] == [b["count"] for b in table]


def test_roc_diagram_area_matches_scikit_learn(hindcast):
    p, o = hindcast["forecast"].to_numpy(), hindcast["observed"].to_numpy()
    false_alarm_rate, hit_rate, _ = roc_curve_points(p, o)
    figure = plots.roc_diagram(false_alarm_rate, hit_rate)
    assert_not_blank(figure)
    (ax,) = figure.axes
    assert ax.get_xlabel() == "false alarm rate" and ax.get_ylabel() == "hit rate"
    label = [drawn for drawn in ax.get_lines() if drawn.get_label().startswith("hindcast")][0].get_label()
    assert f"area {roc_auc_score(o, p):.2f}" in label


def test_plots_leave_pyplot_alone():
    """Importing and drawing never loads pyplot (no global figure state, no display)."""
    code = ("import sys, analogs.presentation.figures as p; f = p.new_figure(); f.add_subplot().plot([1, 2]); "
            "p.figure_png(f); print('matplotlib.pyplot' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"


def test_figures_take_no_store():
    """Presentation only draws: no figure function takes a store argument."""
    import inspect
    for name, function in inspect.getmembers(plots, inspect.isfunction):
        if function.__module__ == plots.__name__:
            assert "store" not in inspect.signature(function).parameters, name


def _ink(figure):
    """Ink of a figure drawn at 90 dpi on white: (sum of darkness, bounding box rows and
    columns of the inked pixels)."""
    figure.set_dpi(90)
    grey = pixels(figure)[..., :3].mean(axis=-1)
    rows, columns = np.nonzero(grey < 250)
    return (255.0 - grey).sum(), (rows.min(), rows.max(), columns.min(), columns.max())


def test_text_drawn_as_matplotlib_draws_it():
    """The maps' canvas writes each line of text as one FreeType bitmap: the text covers
    the place matplotlib's own Agg renderer gives it (reference: a stock
    FigureCanvasAgg) to a pixel, with the same amount of ink to 1 %, for each alignment
    and size of a two-line label as the analog grid's titles are."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    cases = [{"ha": "left", "va": "bottom"}, {"ha": "center", "va": "top"},
             {"ha": "right", "va": "center"}, {"ha": "left", "va": "baseline"}]
    for case, size in [(case, size) for case in cases for size in (6.5, 10.0)]:
        drawn = []
        for make in (lambda: plots.new_figure(3.0, 1.0),
                     lambda: FigureCanvasAgg(Figure(figsize=(3.0, 1.0))).figure):
            figure = make()
            figure.text(0.5, 0.5, "#12 2003-07-02 northwest_flow\nd 0.83, 4 events in region",
                        fontsize=size, **case)
            drawn.append(_ink(figure))
        (ours, box), (theirs, reference) = drawn
        assert np.all(np.abs(np.subtract(box, reference)) <= 1), (case, size)
        assert abs(ours - theirs) <= 0.01 * theirs, (case, size)
    # Rotated text keeps matplotlib's own path (it is not written as one bitmap).
    figure = plots.new_figure(1.0, 3.0)
    figure.text(0.5, 0.5, "rotated", rotation=90)
    assert _ink(figure)[0] > 0

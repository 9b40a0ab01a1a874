"""Report pictures: which planes are drawn, what the colour scale means, robustness to odd shares."""
import io

import matplotlib
import matplotlib.image
import numpy as np
import pytest

from refops.report import figures

# Reference: matplotlib's cividis colour map; its top colour is where shares far over the bound go.
TOP = np.array(matplotlib.colormaps["cividis"](1.0)[:3])


def pixels(png):
    assert png[:8] == b"\x89PNG\r\n\x1a\n"
    return matplotlib.image.imread(io.BytesIO(png), format="png")[..., :3]


def top_coloured(png):
    return int(np.sum(np.all(np.abs(pixels(png) - TOP) < 0.05, axis=-1)))


def test_drawing_is_headless():
    figures.share_histogram(np.ones(3), "x")
    assert matplotlib.get_backend().lower() == "agg"


def test_worst_planes_rank_by_their_largest_share_with_mismatches_first():
    share = np.zeros((2, 3, 4, 5))
    share[1, 2, 3, 4] = 5.0
    share[1, 0, 2, 2] = 2.0
    share[0, 1, 0, 0] = np.inf
    planes = figures.worst_planes(share, count=3)
    assert [index for index, _ in planes] == [(0, 1), (1, 2), (1, 0)]
    for index, plane in planes:
        np.testing.assert_array_equal(plane, share[index])


@pytest.mark.parametrize("shape, expected", [
    ((4, 5), [((), (4, 5))]),
    ((7,), [((), (1, 7))]),
    ((), []),
    ((0, 3, 4), []),
], ids=["matrix", "vector", "scalar", "empty"])
def test_worst_planes_of_other_ranks(shape, expected):
    planes = figures.worst_planes(np.ones(shape))
    assert [(index, plane.shape) for index, plane in planes] == expected


def test_plane_labels_say_which_slice_is_shown():
    assert figures.plane_label("input", (1, 2), 4) == "input[1, 2, :, :]"
    assert figures.plane_label("weight", (), 2) == "weight[:, :]"
    assert figures.plane_label("bias", (), 1) == "bias[:]"


def test_heatmap_colour_marks_the_bound_at_the_middle_of_the_scale():
    within = np.random.default_rng(0).uniform(0, 0.5, (2, 3, 6, 5))
    within[0, 0, 0, :] = 0.99  # just inside the bound: the middle of the scale, not its top
    over = within.copy()
    over[1, 2, 5, :] = 100.0
    # only the colour bar's tip has the top colour while every element is within the bound
    assert top_coloured(figures.share_heatmaps(within, "input")) < 500
    assert top_coloured(figures.share_heatmaps(over, "input")) > 2000


def test_heatmaps_and_histograms_take_zeros_infinities_and_scalars():
    share = np.zeros((3, 4))
    share[0, 0], share[1, 1] = np.inf, 3.0
    assert pixels(figures.share_heatmaps(share, "weight")).shape[1] > 200
    assert pixels(figures.share_histogram(share, "weight")).shape[1] > 200
    assert pixels(figures.share_histogram(np.zeros(0), "bias")).shape[1] > 200
    assert figures.share_heatmaps(np.float64(2.0), "loss") is None


def test_bound_usage_chart_needs_at_least_one_value():
    assert figures.bound_usage_chart({}) is None and figures.bound_usage_chart({"output": []}) is None
    assert pixels(figures.bound_usage_chart({"output": [0.1, 0.5], "input": [0.0]})).shape[0] > 50

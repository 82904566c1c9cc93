"""Every stage's figures are made, for both scenarios and for box extraction, without warnings.

The reductions behind these fixtures run with RuntimeWarning turned into an
error (tests/conftest.py), so a figure (or a stage) that divides by zero or
takes the median of an empty slice fails them.
"""

import json
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.image as mpimg  # noqa: E402
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import pytest  # noqa: E402

from lightledger.pipeline import mask as dq  # noqa: E402
from lightledger.tasks.figures import binned_points, flag_image  # noqa: E402

STAGE_FIGURES = {"calibrate": ["calibrate.png"], "extract": ["extract.png"], "bin": ["lightcurves.png"],
                 "detrend": ["detrend.png", "detrend-channels.png", "grid.png"]}


def _chain(notebook, last):
    """Stage folders from ``last`` back to calibrate, through each entry's made_from."""
    folders = {}
    folder = Path(last)
    while True:
        entry = json.loads((folder / "entry.json").read_text())
        folders[entry["stage"]] = folder
        if entry["stage"] == "calibrate":
            return folders
        folder = Path(notebook) / entry["made_from"]


def _check_figures(folders):
    for stage, folder in folders.items():
        entry = json.loads((folder / "entry.json").read_text())
        assert entry["figures"], f"{stage}: no figure in the entry"
        for name in entry["figures"]:
            image = mpimg.imread(folder / name)
            # a real drawing: larger than a thumbnail and not one flat colour
            assert image.shape[0] > 300 and image.shape[1] > 500, (stage, name, image.shape)
            assert np.std(image[..., :3]) > 0.05, (stage, name)
        assert set(STAGE_FIGURES[stage]) <= set(entry["figures"]), (stage, entry["figures"])


@pytest.mark.slow
@pytest.mark.parametrize("which", ["scan_visit", "stare_visit"])
def test_every_stage_draws_its_figures(which, request):
    visit = request.getfixturevalue(which)
    _check_figures(_chain(visit.notebook, visit.stage_folder("detrend")))


@pytest.mark.slow
@pytest.mark.parametrize("which", ["scan", "stare"])
def test_box_extraction_draws_its_figures(which, request):
    visit = request.getfixturevalue(f"{which}_visit")
    folders = _chain(visit.notebook, request.getfixturevalue(f"{which}_box"))
    assert json.loads((folders["extract"] / "entry.json").read_text())["params"]["method"] == "box"
    _check_figures(folders)


def test_flag_image_labels_each_flag_by_value_and_name():
    bits = np.zeros((6, 8), dq.MASK_DTYPE)
    bits[1, 2] = dq.RAMP_BREAK
    bits[3, 4] = dq.LISTED_BAD | dq.SKY_CLIPPED     # shown as its gravest flag
    fig, ax = plt.subplots()
    names = flag_image(fig, ax, bits)
    labels = [t.get_text() for t in fig.axes[-1].get_yticklabels()]
    plt.close(fig)
    assert names == ["SKY_CLIPPED", "RAMP_BREAK", "LISTED_BAD"]
    assert labels == ["0 clean", "2 SKY_CLIPPED (1)", "4 RAMP_BREAK (1)", "256 LISTED_BAD (1)"]


def test_binned_points_are_group_means_with_their_standard_errors():
    # definition: mean of each consecutive group and scatter / sqrt(size)
    t = np.arange(12.0)
    y = np.array([1, 3, 5, 7, 0, 0, 0, 0, 2, 2, 2, 2], float)
    tb, yb, eb = binned_points(t[::-1], y[::-1], 3)        # order of the input does not matter
    np.testing.assert_allclose(tb, [1.5, 5.5, 9.5])
    np.testing.assert_allclose(yb, [4, 0, 2])
    np.testing.assert_allclose(eb, [np.std([1, 3, 5, 7], ddof=1) / 2, 0, 0])


@pytest.mark.slow
def test_page_overlay_compares_the_entries_of_a_stage(scan_visit, scan_box):
    # two detrend entries (optimal and box extraction) and their bin and extract
    # entries: each stage gives one overlaid figure; a single entry gives none
    import io

    from lightledger.tasks.figures import overlay_png, stage_spectrum

    default = _chain(scan_visit.notebook, scan_visit.stage_folder("detrend"))
    box = _chain(scan_visit.notebook, scan_box)
    for stage in ("extract", "bin", "detrend"):
        png = overlay_png(stage, [("optimal", default[stage]), ("box", box[stage])])
        assert png is not None and png[:8] == b"\x89PNG\r\n\x1a\n", stage
        image = mpimg.imread(io.BytesIO(png))
        assert image.shape[0] > 200 and np.std(image[..., :3]) > 0.02
    assert overlay_png("detrend", [("optimal", default["detrend"])]) is None
    assert overlay_png("calibrate", [("a", default["calibrate"]), ("b", box["calibrate"])]) is None
    depths = stage_spectrum("detrend", default["detrend"])
    assert depths["ylabel"] == "depth (ppm)" and depths["x"].size == 10 and depths["lit"].all()


def test_model_lines_break_at_gaps_and_left_out_exposures():
    # the event model is drawn only over runs of fitted exposures (issue: not over gaps)
    from lightledger.tasks.figures_detrend import segments

    t = np.r_[np.arange(5) * 0.01, 1.0 + np.arange(5) * 0.01, 2.0 + np.arange(3) * 0.01]
    used = np.ones(t.size, bool)
    used[7] = False
    runs = segments(t, used)
    assert [r.tolist() for r in runs] == [[0, 1, 2, 3, 4], [5, 6], [8, 9], [10, 11, 12]]

"""Shape-parameter search: a minimum at an end of the grid is looked past (pipeline.shapesearch)."""

from types import SimpleNamespace

import numpy as np
import pytest

from lightledger.pipeline.shapesearch import search_shapes
from lightledger.pipeline.systematics import ShapeParam


def _parabola(best, log=True, name="ramp.tau"):
    """chi-square with its minimum at ``best`` (in ln for a log parameter): a stand-in fit."""
    def evaluate(values):
        x = values[name]
        d = np.log(x / best) if log else x - best
        return SimpleNamespace(chi2=100.0 + 50.0 * d ** 2)
    return evaluate


GRID = tuple(np.geomspace(1.0, 60.0, 16))      # minutes, the default ramp grid's shape


def test_interior_minimum_is_unchanged():
    out = search_shapes(_parabola(9.0), [("ramp.tau", ShapeParam("tau", GRID, log=True))])
    assert out.at_edge == () and out.extended == ()
    assert out.n_fits == len(GRID)


def test_minimum_just_past_the_grid_is_found_by_extending_it():
    # the grid's ratio is (60/1)^(1/15) = 1.314; a minimum at 100 lies two steps past 60
    out = search_shapes(_parabola(100.0), [("ramp.tau", ShapeParam("tau", GRID, log=True))])
    assert out.extended == ("ramp.tau",) and out.at_edge == ()
    ratio = GRID[1] / GRID[0]
    assert out.values["ramp.tau"] == pytest.approx(60.0 * ratio ** 2, rel=1e-9)
    refined = search_shapes(_parabola(100.0), [("ramp.tau", ShapeParam("tau", GRID, True, True))])
    assert refined.values["ramp.tau"] == pytest.approx(100.0, rel=1e-4)


def test_minimum_far_outside_is_reported_at_the_edge():
    for best, end in ((1e4, "upper"), (1e-3, "lower")):
        out = search_shapes(_parabola(best), [("ramp.tau", ShapeParam("tau", GRID, log=True))],
                            max_extend=4)
        assert out.at_edge == ("ramp.tau",) and out.extended == ("ramp.tau",), end
        ratio = GRID[1] / GRID[0]
        expected = 60.0 * ratio ** 4 if end == "upper" else 1.0 / ratio ** 4
        assert out.values["ramp.tau"] == pytest.approx(expected, rel=1e-9)
    # without extension the end itself is reported
    out = search_shapes(_parabola(1e4), [("ramp.tau", ShapeParam("tau", GRID, log=True))],
                        max_extend=0)
    assert out.at_edge == ("ramp.tau",) and out.extended == () and out.values["ramp.tau"] == 60.0


def test_linear_parameter_extends_by_its_end_step_and_single_values_are_not_edges():
    out = search_shapes(_parabola(7.5, log=False, name="p.x"), [("p.x", ShapeParam("x", (0.0, 1.0, 2.0), log=False))])
    assert out.extended == ("p.x",) and out.at_edge == ("p.x",) and out.values["p.x"] == 6.0
    one = search_shapes(_parabola(5.5, log=False, name="p.x"), [("p.x", ShapeParam("x", (1.0,), log=False))])
    assert one.at_edge == () and one.extended == ()


def test_extension_stops_at_the_limits_the_data_set():
    # a ramp shorter than the first exposure's time into its orbit, or longer than an
    # orbit, cannot be told apart from an offset or a slope: the caller's limits stop it
    limits = {"ramp.tau": (0.7, 70.0)}    # one step (ratio 1.314) fits below 1, none above 60
    out = search_shapes(_parabola(1e4), [("ramp.tau", ShapeParam("tau", GRID, log=True))],
                        limits=limits)
    assert out.at_edge == ("ramp.tau",) and out.extended == () and out.values["ramp.tau"] == 60.0
    out = search_shapes(_parabola(1e-3), [("ramp.tau", ShapeParam("tau", GRID, log=True))],
                        limits=limits)
    assert out.extended == ("ramp.tau",) and out.at_edge == ("ramp.tau",)
    assert out.values["ramp.tau"] == pytest.approx(1.0 / (GRID[1] / GRID[0]), rel=1e-9)

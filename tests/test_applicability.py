"""Which parameters do not apply to a visit (lightledger.tasks.applicability)."""

from lightledger.pipeline.parameters import resolve
from lightledger.tasks.applicability import not_applying, visit_facts


def test_scan_parameters_do_not_apply_to_a_stare():
    facts = visit_facts(scanning=False, n_orbits=1, kind="eclipse", phase_curve=True)
    detrend = not_applying("detrend", resolve("detrend"), facts)
    assert {"drop_first_orbit", "limb_darkening_prior"} <= set(detrend)
    assert "models" not in detrend and "phase_curve_model" not in detrend
    assert "band_padding" in not_applying("calibrate", resolve("calibrate"), facts)


def test_scan_visit_and_channel_choices():
    facts = visit_facts(scanning=True, n_orbits=5, kind="transit")
    detrend = not_applying("detrend", resolve("detrend"), facts)
    assert "models" not in detrend and "drop_first_orbit" not in detrend
    assert "phase_curve_model" in detrend              # a transit has no eclipse phase curve
    assert "drop_first_orbit" in not_applying("detrend", resolve("detrend"),
                                              visit_facts(scanning=True, n_orbits=2, kind="transit"))
    given = not_applying("bin", resolve("bin", {"edges": [1.3, 1.5, 1.7]}), facts)
    assert set(given) == {"width", "n_channels", "equal_counts"}
    assert not_applying("bin", resolve("bin"), facts) == {}
    # every reason names something the observer can check, in one line
    assert all("\n" not in r and r for r in detrend.values())


def test_model_grid_parameters_that_do_not_apply():
    stare = visit_facts(scanning=False, n_orbits=1, kind="eclipse", phase_curve=False)
    one = not_applying("detrend", resolve("detrend", {"models": ["visit1+orbit2+scan+ramp"]}), stare)
    # a stare has one orbit and no scan directions: those tokens are left out of its models
    assert "orbit2" in one["models"] and "scan" in one["models"] and "ramp" not in one["models"]
    assert "criterion" in one                            # one model: nothing to weigh
    grid = not_applying("detrend", resolve("detrend", {"models": ["visit1+ramp", "visit2+ramp"]}),
                        stare)
    assert "models" not in grid and "criterion" not in grid
    scan = visit_facts(scanning=True, n_orbits=5, kind="transit")
    assert "models" not in not_applying("detrend", resolve("detrend", {"models": ["visit1+orbit2+scan"]}),
                                        scan)
    # the phase-curve parameters belong to phase-curve events
    assert {"harmonics", "fit_radius", "phase_bins"} <= set(not_applying("detrend", resolve("detrend"), scan))
    phase = not_applying("detrend", resolve("detrend"),
                         visit_facts(scanning=True, n_orbits=20, kind="phase-curve"))
    assert "harmonics" not in phase and "phase_curve" in phase

"""Calibrating a chunk's exposures as arrays gives the numbers of the per-exposure calibration.

Reference: :func:`lightledger.pipeline.calibrate.calibrate_exposure`, one
exposure at a time, whose steps are checked against the published methods in
tests/test_calibrate.py, test_ramps.py, test_destripe.py and
test_background.py.  The block form must give its numbers: here the stored
products (float32 flux and variance, the flag bitfield) compared value by
value on exposures rendered by the forward model, with the options a visit
can set.
"""

import numpy as np
import pytest

from lightledger.pipeline import mask as dq
from lightledger.pipeline.chunkcal import ExposureSetup, calibrate_chunk
from lightledger.pipeline.calibrate import calibrate_exposure
from lightledger.pipeline.sourcemask import trace_source_mask
from lightledger.pipeline.tracemasks import trace_source_masks


@pytest.fixture(scope="module")
def stare_chunk(raw_stare):
    from lightledger.tasks.base import visit_config
    from lightledger.tasks.check import clip_level
    from lightledger.tasks.geometry import expected_source_rows
    from lightledger.tasks.rawio import inventory, read_exposures, usable
    from lightledger.tasks.references import load_references

    visit = visit_config(raw_stare, "[]")
    refs = usable(inventory(visit.raw, visit.profile))[:20]
    ny, nx = refs[0].shape[1:]
    ref = load_references(visit.profile, (ny, nx), refs[0].origin, visit.target["source_x"])
    reads = read_exposures(refs, visit.profile)
    level = clip_level(refs[0], ref.bias, visit.profile.saturation)
    setups = [ExposureSetup(read_times=tuple(e.read_times), source_rows=expected_source_rows(
        visit, nx, ny, e.origin, e.scan_velocity, e.exposure_time), clip_level=level,
        storage_span=e.wrap) for e in refs]
    common = dict(bias_adu=ref.bias, dark_rate=ref.dark, flat=ref.flat, nonlinearity=ref.nonlinearity,
                  bad_pixels=ref.bad_pixels, gain=visit.profile.gain,
                  read_noise=visit.profile.read_noise, saturation_adu=visit.profile.saturation,
                  detect_clipping=True)
    return reads, setups, common


def _reference(reads, setups, common, **options):
    outs = [calibrate_exposure(reads[i], np.asarray(s.read_times), scan_velocity=s.scan_velocity,
                               source_rows=s.source_rows, destripe=s.destripe,
                               clip_level=s.clip_level, storage_span=s.storage_span,
                               **common, **options)
            for i, s in enumerate(setups)]
    return outs


@pytest.mark.parametrize("destripe, options", [
    ("differences", {}),
    ("off", {}),
    ("differences", {"ramp_method": "diff", "background_method": "none"}),
    ("off", {"weighting": "unweighted", "jump_threshold": 4.0}),
])
def test_chunk_gives_the_per_exposure_products(stare_chunk, destripe, options):
    reads, setups, common = stare_chunk
    setups = [ExposureSetup(read_times=s.read_times, source_rows=s.source_rows, destripe=destripe,
                            clip_level=s.clip_level, storage_span=s.storage_span) for s in setups]
    done = []
    got = calibrate_chunk(reads, setups, **common, **options, progress=done.append)
    ref = _reference(reads, setups, common, **options)
    assert done[-1] == len(setups)
    # the stored products: float32 flux and variance, the bitfield, the per-exposure facts
    np.testing.assert_array_equal(got.flux, np.stack([o.flux for o in ref]).astype(np.float32))
    np.testing.assert_array_equal(got.variance, np.stack([o.variance for o in ref]).astype(np.float32))
    np.testing.assert_array_equal(got.bits, np.stack([o.bits for o in ref]))
    np.testing.assert_allclose(got.background_level, [o.background_level for o in ref], rtol=1e-12)
    np.testing.assert_array_equal(got.mid_time_offset, [o.mid_time_offset for o in ref])
    np.testing.assert_array_equal(got.integration_time, [o.integration_time for o in ref])
    for name in dq.FLAGS:
        assert list(got.flag_counts[name]) == [o.flag_counts[name] for o in ref], name


def test_trace_masks_of_a_block_are_the_per_frame_masks():
    # frames with a tilted trace, noise, a few hot pixels and masked pixels
    rng = np.random.default_rng(3)
    n, ny, nx = 6, 40, 120
    y = np.arange(ny)[:, None]
    frames = []
    for k in range(n):
        centre = 18.0 + 0.02 * np.arange(nx) + 0.3 * k
        trace = 800.0 * np.exp(-0.5 * ((y - centre) / 1.5) ** 2) * (np.arange(nx) > 10)
        frame = trace + rng.normal(0.0, 5.0, (ny, nx))
        frame[rng.random((ny, nx)) < 0.002] += 3000.0
        frames.append(frame)
    frames = np.array(frames)
    mask = rng.random(frames.shape) < 0.01
    for kwargs in ({}, {"rows": (15, 25), "row_pad": 1, "grow_sigma": 2.0}):
        block = trace_source_masks(frames, mask=mask, **kwargs)
        for k in range(n):
            one = trace_source_mask(frames[k], mask=mask[k], **kwargs)
            np.testing.assert_array_equal(block.mask[k], one.mask)
            np.testing.assert_array_equal(block.rows[k], one.rows)
            np.testing.assert_array_equal(block.columns[k], one.columns)

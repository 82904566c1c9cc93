"""Property-based tests of every input loader: no exception escapes but the documented ones.

Hypothesis generates damaged inputs for the TOML loaders (arbitrary bytes, and
valid documents with values of any TOML type put at any key), for ``--set``
texts, and for the raw reader (header cards, array shapes and types, HDU
order and kind, and byte damage of a FITS file laid out as the README's "Raw
exposure layout"; FITS Standard 4.0 for the structure).  The property is the
project's contract: the validation pass returns its report (problems, each
naming a file or option) and never raises; the strict loaders raise only
:class:`~lightledger.pipeline.errors.LightledgerError`.

The examples here are bounded (``max_examples`` small, derandomised) to keep the
suite fast; ``tests/benchmarks/fuzz_inputs.py`` runs the same properties
(the ``prop_*`` functions and strategies below) with many more examples.  Inputs that once broke the loaders are kept below as
ordinary tests.
"""

import math
import warnings
from pathlib import Path

import numpy as np
import pytest
from astropy.io import fits
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from lightledger.pipeline.errors import LightledgerError
from lightledger.pipeline.parameters import STAGES, parse_assignment, resolve
from lightledger.tasks.check import check_visit
from lightledger.tasks.config import load_profile, load_visit
from lightledger.tasks.problems import Problems
from lightledger.tasks.rawio import inventory, read_exposure, survey

SUITE = settings(max_examples=25, deadline=None, derandomize=True,
                 suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])

PROFILE = """name = "tiny"
[detector]
gain = 2.0
read_noise = 10.0
saturation = 30000.0
full_shape = [8, 10]
[reference_files]
bias = "bias.fits"
dark = "dark.fits"
flat = "flat.fits"
nonlinearity = "nonlin.fits"
bad_pixels = "bad.fits"
[dispersion]
coefficients = [1.2, 0.01]
column_offset = 0.0
[trace]
row_offset = 0.0
tilt = 0.0
width = 1.0
"""

VISIT = """[visit]
name = "tiny visit"
raw = "raw"
profile = "instrument.toml"
[target]
ra = 10.0
dec = -5.0
teff = 5000.0
source_x = 5.0
source_y = 3.0
[event]
kind = "transit"
t0 = 2460000.5
period = 2.0
duration = 0.1
rp_rs = 0.1
a_rs = 8.0
inclination = 88.0
[stages.bin]
n_channels = 2
"""

N_READS, NY, NX = 3, 4, 6


def _raw_hdus(n_exp=None, start=0.0):
    """A raw file of the layout: 3-D READS (one exposure) or 4-D with STARTOFF."""
    rng = np.random.default_rng(1)
    ramp = 1000.0 + np.arange(N_READS)[:, None, None] * 500.0 + rng.normal(0, 3, (N_READS, NY, NX))
    header = fits.Header()
    header["DATE-BEG"] = "2023-01-01T00:00:%02d" % start
    header["TIMESYS"] = "UTC"
    header["XPOSURE"] = 20.0
    header["SCANVEL"] = 0.0
    header["SUBORIGX"] = 2
    header["SUBORIGY"] = 1
    reads = ramp if n_exp is None else np.stack([ramp] * n_exp)
    hdus = [fits.PrimaryHDU(header=header), fits.ImageHDU(reads.astype(np.float32), name="READS"),
            fits.ImageHDU(np.array([0.0, 10.0, 20.0]), name="READTIME")]
    if n_exp is not None:
        hdus.append(fits.ImageHDU(np.arange(n_exp) * 30.0, name="STARTOFF"))
    return hdus


@pytest.fixture(scope="module")
def tiny(tmp_path_factory):
    """A tiny visit: references, profile, description, one 3-D and one 4-D raw file."""
    return make_tiny(tmp_path_factory.mktemp("tiny"))


def make_tiny(root):
    """Write the tiny visit into ``root`` and return ``root``."""
    for name, value in (("bias", 1000.0), ("dark", 0.01), ("flat", 1.0), ("bad", 0)):
        fits.PrimaryHDU(np.full((8, 10), value)).writeto(root / f"{name}.fits")
    fits.PrimaryHDU(np.zeros((1, 8, 10))).writeto(root / "nonlin.fits")
    (root / "instrument.toml").write_text(PROFILE)
    (root / "visit.toml").write_text(VISIT)
    (root / "raw").mkdir()
    fits.HDUList(_raw_hdus()).writeto(root / "raw" / "a.fits")
    fits.HDUList(_raw_hdus(n_exp=3, start=30)).writeto(root / "raw" / "b.fits")
    report = check_visit(root / "visit.toml", until="bin")
    assert report.errors == [] and len(report.usable) == 4, report.lines()
    return root


def _check_report(report):
    """The contract of a validation report: every problem names where it is."""
    for p in report.problems.items:
        assert p.where or p.what.startswith(("/", "--set")), p
        assert "\n" not in p.what


# -- --set and stage parameters -------------------------------------------------------------

KEYS = [f"{stage}.{p.name}" for stage, spec in STAGES.items() for p in spec.params]
VALUES = st.one_of(st.text(max_size=12), st.sampled_from(["nan", "inf", "-inf", "1e999", "[]",
                                                          "[nan, 1]", "true", "0", "-1", "1" * 400]),
                   st.floats(allow_nan=True).map(repr), st.integers().map(str))


SET_TEXTS = st.one_of(st.text(max_size=40), st.tuples(st.sampled_from(KEYS), VALUES).map("=".join))


@SUITE
@given(SET_TEXTS)
def test_set_option_raises_only_its_own_error(text):
    prop_set_text(text)


def prop_set_text(text):
    """--set: only the option's own error, and an accepted value is finite."""
    try:
        stage, key, value = parse_assignment(text)
    except LightledgerError as exc:
        assert str(exc).startswith("--set ")
        return
    params = resolve(stage, {key: value})       # an accepted value resolves, and is finite
    for v in np.atleast_1d(params[key]):
        if isinstance(v, float):
            assert math.isfinite(v)


# -- TOML documents ----------------------------------------------------------------------------

def _toml(value):
    """TOML text of a value (the standard library reads TOML but does not write it)."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        return "nan" if math.isnan(value) else ("inf" if value > 0 else "-inf") \
            if math.isinf(value) else repr(value)
    if isinstance(value, str):
        return '"' + "".join(c if c.isprintable() and c not in '"\\' else f"\\u{ord(c):04x}"
                             for c in value if ord(c) < 0x10000 and not 0xD800 <= ord(c) < 0xE000) + '"'
    if isinstance(value, list):
        return "[" + ", ".join(_toml(v) for v in value) + "]"
    if isinstance(value, dict):
        return "{" + ", ".join(f'"{k}" = {_toml(v)}' for k, v in value.items()) + "}"
    raise TypeError(value)


TOML_VALUES = st.recursive(
    st.one_of(st.booleans(), st.integers(min_value=-2**63, max_value=2**63 - 1),
              st.floats(), st.text(max_size=10)),
    lambda inner: st.one_of(st.lists(inner, max_size=4),
                            st.dictionaries(st.sampled_from(["file", "reason", "first", "last",
                                                             "from", "to", "channel", "x"]),
                                            inner, max_size=3)),
    max_leaves=8)

VISIT_KEYS = [("visit", "name"), ("visit", "raw"), ("visit", "notebook"), ("visit", "on_bad_exposure"),
              ("target", "ra"), ("target", "dec"), ("target", "teff"), ("target", "source_x"),
              ("event", "kind"), ("event", "t0"), ("event", "period"), ("event", "duration"),
              ("event", "a_rs"), ("event", "inclination"), ("event", "u1"), ("exclude", "files"),
              ("exclude", "exposures"), ("exclude", "times"), ("exclude", "channels"),
              ("stages.calibrate", "chunk_size"), ("stages.calibrate", "break_threshold"),
              ("stages.extract", "clip_threshold"), ("stages.bin", "edges"),
              ("stages.bin", "white_range"), ("stages.bin", "n_channels"), ("stages.detrend", "fit"),
              ("stages.bin", "unknown"), ("target", "extra")]
PROFILE_KEYS = [("detector", "gain"), ("detector", "saturation"), ("detector", "full_shape"),
                ("reference_files", "bias"), ("flat", "wavelength_range"),
                ("dispersion", "coefficients"), ("dispersion", "column_offset"), ("trace", "width"),
                ("keywords", "DATE-BEG"), ("keywords", "SCANVEL"), ("extensions", "READS"),
                ("extensions", "STARTOFF"), ("detector", "gian")]


def _set_key(text, table, key, value):
    lines = text.splitlines()
    header = f"[{table}]"
    if header not in lines:
        lines.append(header)
    start = lines.index(header)
    end = next((i for i in range(start + 1, len(lines)) if lines[i].startswith("[")), len(lines))
    new = f'"{key}" = {_toml(value)}'
    for i in range(start + 1, end):
        if lines[i].split("=")[0].strip().strip('"') == key:
            lines[i] = new
            break
    else:
        lines.insert(start + 1, new)
    return "\n".join(lines) + "\n"


VISIT_EDITS = st.lists(st.tuples(st.sampled_from(VISIT_KEYS), TOML_VALUES), min_size=1, max_size=3)
PROFILE_EDITS = st.lists(st.tuples(st.sampled_from(PROFILE_KEYS), TOML_VALUES), max_size=2)


@SUITE
@given(VISIT_EDITS, PROFILE_EDITS)
def test_toml_values_of_any_type_at_any_key(tiny, tmp_path_factory, visit_edits, profile_edits):
    prop_toml_edits(tiny, tmp_path_factory.mktemp("toml"), visit_edits, profile_edits)


def prop_toml_edits(tiny, root, visit_edits, profile_edits):
    """Values of any TOML type at any key: the pass reports, the strict loader raises ours."""
    text, prof = VISIT.replace('profile = "instrument.toml"',
                               f'profile = "{tiny / "instrument.toml"}"'), PROFILE
    text = text.replace('raw = "raw"', f'raw = "{tiny / "raw"}"')
    for (table, key), value in visit_edits:
        text = _set_key(text, table, key, value)
    for (table, key), value in profile_edits:
        prof = _set_key(prof, table, key, value)
    for name in ("bias", "dark", "flat", "bad", "nonlin"):
        (root / f"{name}.fits").symlink_to(tiny / f"{name}.fits")
    (root / "instrument.toml").write_text(prof, encoding="utf-8")
    text = text.replace(f'profile = "{tiny / "instrument.toml"}"', 'profile = "instrument.toml"')
    (root / "visit.toml").write_text(text, encoding="utf-8")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        report = check_visit(root / "visit.toml", read_data=False)
    _check_report(report)
    try:
        load_visit(root / "visit.toml")
    except LightledgerError:
        pass


TOML_BYTES = (st.binary(max_size=400), st.sampled_from(["visit.toml", "instrument.toml"]))


@SUITE
@given(*TOML_BYTES)
def test_toml_files_of_any_bytes(tmp_path_factory, data, name):
    prop_toml_bytes(tmp_path_factory.mktemp("bytes"), data, name)


def prop_toml_bytes(root, data, name):
    """Any bytes as a TOML file: problems naming the file, nothing raised."""
    (root / name).write_bytes(data)
    problems = Problems()
    (load_visit if name == "visit.toml" else load_profile)(root / name, problems=problems)
    assert problems.errors and all(str(root) in p.where for p in problems.errors)


# -- raw files ---------------------------------------------------------------------------------

def _byte_damage(data, draw):
    kind = draw(st.sampled_from(["truncate", "flip", "zero", "card", "insert"]))
    b = bytearray(data)
    if kind == "truncate":
        return bytes(b[:draw(st.integers(0, len(b) - 1))])
    if kind == "flip":
        for _ in range(draw(st.integers(1, 8))):
            b[draw(st.integers(0, len(b) - 1))] = draw(st.integers(0, 255))
        return bytes(b)
    if kind == "zero":
        k = draw(st.integers(0, len(b) // 2880 - 1)) * 2880
        b[k:k + 2880] = bytes(2880)
        return bytes(b)
    if kind == "insert":
        k = draw(st.integers(0, len(b)))
        return bytes(b[:k]) + draw(st.binary(min_size=1, max_size=100)) + bytes(b[k:])
    # a header card overwritten with any printable text
    cards = [i for i in range(0, len(b), 80) if b[i:i + 8].strip() and b[i + 8:i + 10] == b"= "]
    i = draw(st.sampled_from(cards))
    value = draw(st.text(st.characters(min_codepoint=32, max_codepoint=126), max_size=40))
    b[i + 10:i + 80] = value.ljust(70).encode()[:70]
    return bytes(b)


def _hdu_damage(hdus, draw):
    kind = draw(st.sampled_from(["drop", "swap", "table", "dtype", "shape", "values", "header"]))
    if kind == "drop":
        del hdus[draw(st.integers(1, len(hdus) - 1))]
    elif kind == "swap":
        i, j = draw(st.integers(1, len(hdus) - 1)), draw(st.integers(1, len(hdus) - 1))
        hdus[i], hdus[j] = hdus[j], hdus[i]
    elif kind == "table":
        i = draw(st.integers(1, len(hdus) - 1))
        name = hdus[i].name
        hdus[i] = fits.BinTableHDU.from_columns([fits.Column(name="x", format="E",
                                                             array=np.zeros(3))], name=name)
    elif kind == "dtype":
        dtype = draw(st.sampled_from([np.int16, np.uint16, np.int32, np.float64, np.uint8]))
        hdus[1] = fits.ImageHDU(np.asarray(hdus[1].data).astype(dtype), name="READS")
    elif kind == "shape":
        data = np.asarray(hdus[1].data)
        choice = draw(st.sampled_from(["drop", "add", "empty", "flat"]))
        data = {"drop": lambda a: a[0], "add": lambda a: a[None, None],
                "empty": lambda a: a[..., :0], "flat": lambda a: a.ravel()}[choice](data)
        hdus[1] = fits.ImageHDU(data, name="READS")
    elif kind == "values":
        data = np.array(hdus[1].data, dtype=np.float32)
        value = draw(st.sampled_from([np.nan, np.inf, -np.inf, 3e38, -1e6, 0.0]))
        mask = draw(st.sampled_from(["all", "first", "some"]))
        if mask == "all":
            data[...] = value
        elif mask == "first":
            data[..., 0, :, :] = value
        else:
            data[..., 1, 2] = value
        hdus[1] = fits.ImageHDU(data, name="READS")
    else:
        key = draw(st.sampled_from(["DATE-BEG", "TIMESYS", "XPOSURE", "SCANVEL", "SUBORIGX",
                                    "SUBORIGY", "OBSGEO-X"]))
        value = draw(st.one_of(st.none(), st.booleans(), st.integers(-10**12, 10**12),
                               st.floats(allow_nan=False, allow_infinity=False),
                               st.text(st.characters(min_codepoint=32, max_codepoint=126),
                                       max_size=20)))
        if value is None:
            hdus[0].header.remove(key, ignore_missing=True)
        else:
            hdus[0].header[key] = value
    return hdus


def _reduce_check(root):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        report = check_visit(root / "visit.toml", until="bin")
    _check_report(report)
    profile = report.visit.profile
    try:
        inventory(root / "raw", profile)
    except LightledgerError:
        pass
    problems = Problems()
    for ref in survey(root / "raw", profile, problems):
        assert ref.excluded == bool(ref.reason)
        if not ref.excluded:
            try:
                assert read_exposure(ref).shape == ref.shape
            except LightledgerError:
                pass
    return report


def _tiny_copy(tiny, root):
    import shutil

    shutil.copytree(tiny, root, dirs_exist_ok=True)
    return root


@SUITE
@given(st.data())
def test_raw_files_with_byte_damage(tiny, tmp_path_factory, data):
    prop_raw_bytes(tiny, tmp_path_factory.mktemp("bytes"), data)


def prop_raw_bytes(tiny, root, data):
    """Byte damage of a raw file: set aside or reported, nothing raised."""
    root = _tiny_copy(tiny, root)
    path = root / "raw" / data.draw(st.sampled_from(["a.fits", "b.fits"]))
    path.write_bytes(_byte_damage(path.read_bytes(), data.draw))
    _reduce_check(root)


@SUITE
@given(st.data())
def test_raw_files_with_header_array_and_hdu_damage(tiny, tmp_path_factory, data):
    prop_raw_hdus(tiny, tmp_path_factory.mktemp("hdus"), data)


def prop_raw_hdus(tiny, root, data):
    """Header, array and HDU damage of a valid FITS raw file: only the raw file is blamed."""
    root = _tiny_copy(tiny, root)
    name = data.draw(st.sampled_from(["a.fits", "b.fits"]))
    hdus = _raw_hdus() if name == "a.fits" else _raw_hdus(n_exp=3, start=30)
    hdus = _hdu_damage(hdus, data.draw)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fits.HDUList(hdus).writeto(root / "raw" / name, overwrite=True, output_verify="silentfix")
    report = _reduce_check(root)
    assert report.errors == [] or any("no usable exposure" in p.what for p in report.errors) \
        or all("raw" in p.where for p in report.errors), report.lines()


@SUITE
@given(st.data())
def test_reference_files_with_byte_damage(tiny, tmp_path_factory, data):
    prop_reference_bytes(tiny, tmp_path_factory.mktemp("refs"), data)


def prop_reference_bytes(tiny, root, data):
    """Byte damage of a reference file: reported, nothing raised."""
    root = _tiny_copy(tiny, root)
    path = root / data.draw(st.sampled_from(["bias.fits", "dark.fits", "flat.fits", "bad.fits",
                                             "nonlin.fits"]))
    path.write_bytes(_byte_damage(path.read_bytes(), data.draw))
    _reduce_check(root)


# -- reproducers the fuzzing found -----------------------------------------------------------

def test_reproducer_huge_integer_for_a_float_key(tiny, tmp_path):
    """A TOML integer beyond a float's range for a float key, and --set of a 400-digit number."""
    with pytest.raises(LightledgerError, match="chunk_size must be a finite number"):
        parse_assignment("calibrate.chunk_size=" + "1" * 400)
    text = VISIT.replace("teff = 5000.0", "teff = " + "9" * 400)
    (tmp_path / "visit.toml").write_text(text.replace('raw = "raw"', f'raw = "{tiny / "raw"}"')
                                         .replace('profile = "instrument.toml"',
                                                  f'profile = "{tiny / "instrument.toml"}"'))
    with pytest.raises(LightledgerError, match="target.teff must be a finite number"):
        load_visit(tmp_path / "visit.toml")


def test_reproducer_unparsable_structural_card(tiny, tmp_path):
    """BITPIX's value overwritten by ':' (found by the byte fuzzing: a VerifyError escaped)."""
    root = _tiny_copy(tiny, tmp_path / "v")
    path = root / "raw" / "a.fits"
    data = bytearray(path.read_bytes())
    data[80 + 10:160] = b":".ljust(70)            # the second card of the primary header: BITPIX
    path.write_bytes(bytes(data))
    report = _reduce_check(root)
    aside = [r for r in report.set_aside if r.file == str(path)]
    assert len(aside) == 1 and "BITPIX cannot be parsed" in aside[0].reason

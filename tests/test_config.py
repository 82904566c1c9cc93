"""The instrument profile and visit description are validated at load.

Expected behaviour is the project's own contract (one-line errors naming the
file and key); the TOML itself is parsed by the standard library's tomllib
(TOML 1.0), which is the reference here.
"""

import numpy as np
import pytest
from astropy.io import fits

from lightledger.pipeline.errors import ConfigError, ParameterError
from lightledger.pipeline.parameters import STAGES, parse_assignment, resolve
from lightledger.tasks.config import load_profile, load_visit

PROFILE = """
name = "test profile"
[detector]
gain = 2.0
read_noise = 12.0
saturation = 30000.0
full_shape = [8, 10]
[reference_files]
bias = "bias.fits"
dark = "dark.fits"
flat = "flat.fits"
nonlinearity = "nonlin.fits"
bad_pixels = "bad.fits"
[dispersion]
coefficients = [1.1, 0.005]
column_offset = -2.0
[trace]
row_offset = 0.0
tilt = 0.0
width = 1.0
[keywords]
DATE-BEG = "DATE-OBS"
[extensions]
READS = "RAMPS"
"""

VISIT = """
[visit]
name = "test visit"
raw = "raw"
profile = "instrument.toml"
[target]
ra = 10.0
dec = -5.0
teff = 5000.0
source_x = 4.0
source_y = 3.0
[event]
kind = "transit"
t0 = 2461000.0
period = 2.0
duration = 0.1
rp_rs = 0.1
a_rs = 8.0
inclination = 88.0
[stages.extract]
clip_threshold = 4.0
"""


@pytest.fixture
def visit_dir(tmp_path):
    for name in ("bias", "dark", "flat", "bad"):
        fits.PrimaryHDU(np.zeros((8, 10))).writeto(tmp_path / f"{name}.fits")
    fits.PrimaryHDU(np.zeros((2, 8, 10))).writeto(tmp_path / "nonlin.fits")
    (tmp_path / "raw").mkdir()
    (tmp_path / "instrument.toml").write_text(PROFILE)
    (tmp_path / "visit.toml").write_text(VISIT)
    return tmp_path


def test_valid_documents_load(visit_dir):
    visit = load_visit(visit_dir / "visit.toml")
    assert visit.profile.gain == 2.0
    assert visit.profile.keyword("DATE-BEG") == "DATE-OBS"
    assert visit.profile.extension("READS") == "RAMPS"
    assert visit.profile.extension("READTIME") == "READTIME"
    assert visit.stages["extract"]["clip_threshold"] == 4.0
    assert visit.stages["extract"]["method"] == STAGES["extract"].defaults()["method"]
    assert visit.notebook == visit_dir / "notebook"


def test_set_takes_a_list_of_model_strings(visit_dir):
    # `--set detrend.models=A,B` as the command line parses it (parse_assignment): a list of
    # strings is a value like any other (it once crashed while being echoed), and a bad
    # model string is one line naming the option.
    from lightledger.pipeline.parameters import parse_assignment

    given = parse_assignment("detrend.models=visit1+scan+ramp,visit1+ramp")
    visit = load_visit(visit_dir / "visit.toml", [given])
    assert visit.stages["detrend"]["models"] == ("visit1+scan+ramp", "visit1+ramp")
    with pytest.raises(ConfigError, match=r"--set detrend\.models=\[visit1\+nonsense\]"):
        load_visit(visit_dir / "visit.toml", [("detrend", "models", ("visit1+nonsense",))])


def test_missing_file_names_the_file(tmp_path):
    with pytest.raises(ConfigError, match=r"nothere\.toml: visit description not found"):
        load_visit(tmp_path / "nothere.toml")


def test_unknown_key_suggests_nearest(visit_dir):
    text = PROFILE.replace("read_noise", "readnoise")
    (visit_dir / "instrument.toml").write_text(text)
    with pytest.raises(ConfigError) as err:
        load_profile(visit_dir / "instrument.toml")
    message = str(err.value)
    assert "instrument.toml" in message
    assert "unknown key detector.readnoise" in message
    assert "did you mean detector.read_noise" in message
    assert "\n" not in message


def test_wrong_type_names_key(visit_dir):
    (visit_dir / "instrument.toml").write_text(PROFILE.replace("gain = 2.0", 'gain = "two"'))
    with pytest.raises(ConfigError, match=r"instrument\.toml: detector\.gain must be a finite number"):
        load_profile(visit_dir / "instrument.toml")


def test_missing_reference_file(visit_dir):
    (visit_dir / "dark.fits").unlink()
    with pytest.raises(ConfigError, match=r"reference_files\.dark names .*dark\.fits, which does not exist"):
        load_profile(visit_dir / "instrument.toml")


def test_unknown_stage_key_in_visit(visit_dir):
    (visit_dir / "visit.toml").write_text(VISIT.replace("clip_threshold", "clip_treshold"))
    with pytest.raises(ConfigError, match=r"unknown key stages\.extract\.clip_treshold.*clip_threshold"):
        load_visit(visit_dir / "visit.toml")


def test_renamed_keyword_must_be_a_layout_keyword(visit_dir):
    (visit_dir / "instrument.toml").write_text(PROFILE.replace('DATE-BEG = "DATE-OBS"',
                                                               'DATE-BGE = "DATE-OBS"'))
    with pytest.raises(ConfigError, match=r"unknown key keywords\.DATE-BGE.*DATE-BEG"):
        load_profile(visit_dir / "instrument.toml")


def test_bad_toml_syntax(visit_dir):
    (visit_dir / "visit.toml").write_text("[visit\nname = 1")
    with pytest.raises(ConfigError, match=r"visit\.toml: not valid TOML"):
        load_visit(visit_dir / "visit.toml")


def test_set_assignment_is_validated():
    assert parse_assignment("extract.clip_threshold=4") == ("extract", "clip_threshold", 4.0)
    assert parse_assignment("bin.edges=[1.1, 1.2,1.3]") == ("bin", "edges", (1.1, 1.2, 1.3))
    assert parse_assignment("detrend.drop_first_orbit=false") == ("detrend", "drop_first_orbit", False)
    with pytest.raises(ParameterError, match="did you mean 'clip_threshold'"):
        parse_assignment("extract.clip_thresold=4")
    with pytest.raises(ParameterError, match="did you mean 'extract'"):
        parse_assignment("extrct.method=box")
    with pytest.raises(ParameterError, match="must be one of optimal, box"):
        parse_assignment("extract.method=boxcar")
    with pytest.raises(ParameterError, match=">= 2.0"):
        resolve("extract", {"clip_threshold": 1.0})

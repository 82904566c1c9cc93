"""The README documents what the code reads and writes.

The check is against the code's own declarations (schemas, columns, flags), so a
key or column added without documentation fails here.
"""

from pathlib import Path

import pytest

from lightledger.pipeline import mask
from lightledger.tasks.config import PROFILE_SCHEMA, RAW_EXTENSIONS, RAW_KEYWORDS, VISIT_SCHEMA
from lightledger.tasks.lightcurves import COLUMNS, SET_ASIDE_COLUMNS

README = Path(__file__).resolve().parents[1] / "README.md"


@pytest.fixture(scope="module")
def readme():
    if not README.is_file():
        pytest.skip("README.md is not beside the tests (installed without the source tree)")
    return README.read_text(encoding="utf-8")


def _keys(schema):
    for key, rule in schema.items():
        if isinstance(rule, dict):
            yield f"[{key}]"
            yield from rule
        elif rule.kind == "map":
            yield f"[{key}"          # a table of its own: [keywords], [stages.extract], ...
        else:
            yield key


@pytest.mark.parametrize("schema", [PROFILE_SCHEMA, VISIT_SCHEMA])
def test_every_toml_key_is_documented(readme, schema):
    missing = [k for k in _keys(schema) if f"`{k}" not in readme]
    assert missing == []


def test_raw_layout_names_are_documented(readme):
    assert [k for k in (*RAW_KEYWORDS, *RAW_EXTENSIONS) if f"`{k}`" not in readme] == []


def test_light_curve_columns_are_documented(readme):
    assert [c for c in (*COLUMNS, *SET_ASIDE_COLUMNS) if f"`{c}`" not in readme] == []


def test_quality_flags_are_documented(readme):
    for name, value in mask.FLAGS.items():
        assert f"| {value} | {name} |" in readme

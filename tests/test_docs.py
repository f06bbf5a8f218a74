"""DEVELOPERS.md's config reference is generated from the schema and kept in step."""

from pathlib import Path

from creditsurv.config import schema_reference

ROOT = Path(__file__).resolve().parents[1]


def test_config_reference_matches_the_schema():
    text = (ROOT / "DEVELOPERS.md").read_text()
    block = text.split("<!-- config-reference:start -->\n", 1)[1].split("\n<!-- config-reference:end -->", 1)[0]
    assert block == schema_reference(), "regenerate the table with creditsurv.config.schema_reference()"

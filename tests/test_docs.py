"""README.md reproduces the config reference and the store layout from their one definition."""

from pathlib import Path

import pipeline.store
from pipeline.config import SCHEMA, describe_schema

README = Path(__file__).resolve().parents[1] / "README.md"


def _between(text: str, begin: str, end: str) -> str:
    return text[text.index(begin) + len(begin) : text.index(end)]


def test_readme_config_reference_is_generated_from_schema():
    readme = README.read_text(encoding="utf-8")
    copied = _between(readme, "<!-- schema:begin -->\n", "<!-- schema:end -->")
    assert copied == describe_schema(), "README config reference is stale: paste gapline schema"


def test_schema_reference_lists_every_field():
    reference = describe_schema()
    for fields in SCHEMA.values():
        for name in fields:
            assert f"| `{name}` |" in reference


def test_readme_store_layout_matches_store_module():
    readme = README.read_text(encoding="utf-8")
    copied = _between(readme, "<!-- layout:begin -->\n```\n", "```\n<!-- layout:end -->")
    doc = pipeline.store.__doc__
    layout = doc[doc.index("STORE/") : doc.index("Every output group")].rstrip()
    layout = "\n".join(line[4:] if line.startswith("    ") else line
                       for line in layout.splitlines())
    assert copied.rstrip() == layout

"""The README's protocol reference is the schema's (generated) reference."""

from runner.reference import reference_markdown

from conftest import ROOT


def test_readme_holds_the_generated_protocol_reference():
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    assert reference_markdown() in readme, "run `python -m runner.reference` and paste its output into README.md"

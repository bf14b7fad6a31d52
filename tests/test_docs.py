"""The README's settings table is generated from the one settings definition."""

from pathlib import Path

from liftmag.commands.common import settings_table_markdown


def test_readme_settings_table_matches_the_settings_definition():
    readme = (Path(__file__).parent.parent / "README.md").read_text()
    start = readme.index("<!-- settings-table:start -->") + len("<!-- settings-table:start -->")
    end = readme.index("<!-- settings-table:end -->")
    assert readme[start:end].strip() == settings_table_markdown().strip()


def test_readme_opens_with_the_job_then_the_two_setup_commands():
    readme = (Path(__file__).parent.parent / "README.md").read_text()
    commands = [line.strip() for line in readme.splitlines() if line.startswith("    make ")]
    assert commands == ["make demo", "make test"]

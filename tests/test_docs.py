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


REPO = Path(__file__).resolve().parent.parent


def _committed_text_files() -> list[Path]:
    import subprocess

    listed = subprocess.run(["git", "-C", str(REPO), "ls-files"], capture_output=True,
                            text=True, check=False)
    if listed.returncode:  # not a git checkout (an unpacked source archive): nothing to check
        return []
    files = [REPO / name for name in listed.stdout.splitlines()]
    return [f for f in files if f.suffix in (".py", ".md", ".sh", ".c", ".in", ".toml", "")
            and f.is_file()]


def test_every_cited_section_of_the_maths_page_exists():
    import re

    page = (REPO / "docs" / "estimators.md").read_text()
    sections = set(re.findall(r"^## (\d+)\.", page, flags=re.MULTILINE))
    checks = set(re.findall(r"\bcheck (\d+[a-z])", page))
    cited_sections, cited_checks = set(), set()
    for path in _committed_text_files():
        text = path.read_text(errors="replace")
        cited_sections |= set(re.findall(r"docs/estimators\.md (?:§\d+(?:,? (?:and )?)?)+", text))
        cited_checks |= set(re.findall(r"check (\d+[a-z])\b", text))
    numbers = {n for cite in cited_sections for n in re.findall(r"§(\d+)", cite)}
    assert numbers, "no test cites docs/estimators.md"
    assert numbers <= sections, f"sections missing from the maths page: {numbers - sections}"
    assert cited_checks <= checks, f"cited checks missing: {cited_checks - checks}"


def test_committed_files_hold_no_absolute_path_of_one_machine():
    import re

    # A path into one machine's workspace or home breaks on every other clone.
    pattern = re.compile(r"(?<![\w.])/(?:work|root|home/\w+)/")
    hits = [f"{path.relative_to(REPO)}:{n}"
            for path in _committed_text_files() if path.name != "test_docs.py"
            for n, line in enumerate(path.read_text(errors="replace").splitlines(), 1)
            if pattern.search(line)]
    assert not hits, hits

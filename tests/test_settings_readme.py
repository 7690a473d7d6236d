"""The README's settings table agrees with the settings' declaration.

Reference: README.md "Settings" table (the documentation users read) against
``analysis.settings.DECLARED`` (each setting's one declaration): every setting has a row with its
command-line flag(s), its choices and its default in words, and a count's row gives its range.
"""
from pathlib import Path

import pytest

from analysis.settings import DECLARED, default_text

README = Path(__file__).resolve().parents[1] / "README.md"


def _rows() -> list[list[str]]:
    text = README.read_text(encoding="utf-8")
    table = text.split("## Settings", 1)[1].split("\n## ", 1)[0]
    rows = []
    for line in table.splitlines():
        if line.startswith("| `"):
            cells = [c.strip() for c in line.replace("\\|", "\0").strip("|").split(" | ")]
            rows.append([c.replace("\0", "|") for c in cells])
    return rows


def _row_of(name: str) -> list[str]:
    found = [r for r in _rows() if f"`{name}`" in r[0]]
    assert len(found) == 1, f"README settings table: {len(found)} rows name `{name}`"
    return found[0]


def test_every_row_names_declared_settings_only():
    rows = _rows()
    assert len(rows) >= 20
    named = {part.strip("`, ") for r in rows for part in r[0].split("(")[0].split()}
    assert named - set(DECLARED) == set(), "README names settings that are not declared"
    assert set(DECLARED) - named == set(), "declared settings missing from the README"


@pytest.mark.parametrize("name", list(DECLARED))
def test_row_gives_flag_choices_and_default(name):
    decl = DECLARED[name]
    setting, default, meaning = _row_of(name)
    assert f"`{decl.flag}" in setting
    if decl.off_flag:
        assert f"`{decl.off_flag}`" in setting
    if decl.kind == "choice":
        assert f"{decl.flag} {'|'.join(decl.choices)}`" in setting
    assert default == default_text(name)
    if decl.kind == "count":
        assert f"{decl.lo:g} to {decl.hi:g}" in meaning

"""Bad settings files and flags end in a message and exit status 2, never a traceback.

Each file in tests/data/bad/settings_*.json is one case; the expected message fragment is the
rule the file breaks (what the README's settings table allows).
"""
from __future__ import annotations

from pathlib import Path

import pytest

from app.cli import main

BAD = Path(__file__).parent / "data" / "bad"

SETTINGS_FILES = {
    "settings_breaks_number.json": "Break points must be a list of numbers, e.g. [10, 20, 40], not 10",
    "settings_breaks_strings.json": "Break points must be a list of numbers, e.g. [10, 20, 40]; '10' is not a number",
    "settings_numbers_as_strings.json": "must be a whole number from 1 to",
    "settings_list.json": "expected a JSON object of setting: value pairs, found a list",
    "settings_roles_string.json": "'roles' must be a JSON object",
    "settings_huge_bins.json": "Time-apart bins must be a whole number from 1 to 200; 20000000 is too large",
    "settings_center_boolean.json": "Centre at must be none, mean, median or a finite number, not True",
}


def test_every_bad_settings_file_has_a_case():
    assert sorted(p.name for p in BAD.glob("settings_*.json")) == sorted(SETTINGS_FILES)


@pytest.mark.parametrize("name", sorted(SETTINGS_FILES))
def test_bad_settings_file_is_a_message(name, tmp_path, capsys):
    rc = main(["summarize", "demo", "--settings", str(BAD / name),
               "--json", str(tmp_path / "out.json")])
    err = capsys.readouterr().err
    assert rc == 2, err
    assert SETTINGS_FILES[name] in err, err
    assert "Traceback" not in err
    assert not (tmp_path / "out.json").exists()


@pytest.mark.parametrize("command", ["summarize", "fit"])
def test_json_into_a_missing_folder_is_a_message(command, tmp_path, capsys):
    out = tmp_path / "no" / "such" / "folder" / "out.json"
    rc = main([command, "demo", "--json", str(out)])
    err = capsys.readouterr().err
    assert rc == 2 and "does not exist" in err and str(out) in err, err


def test_report_into_a_missing_folder_is_a_message(tmp_path, capsys):
    rc = main(["report", "demo", "--no-models", "--out", str(tmp_path / "nope" / "r.html")])
    assert rc == 2 and "does not exist" in capsys.readouterr().err


@pytest.mark.parametrize("flag, value, fragment", [
    ("--variogram-bins", "2000000000", "from 1 to 200"),
    ("--strata", "1000000000", "from 1 to 50"),
    ("--spline-df", "5000", "from 1 to 20"),
    ("--min-visits", "100000", "from 1 to 1000"),
])
def test_huge_count_flags_are_messages_naming_the_flag(flag, value, fragment, tmp_path, capsys):
    rc = main(["summarize", "demo", flag, value, "--json", str(tmp_path / "o.json")])
    err = capsys.readouterr().err
    assert rc == 2 and fragment in err and flag in err, err


@pytest.mark.parametrize("command", ["fit", "report"])
def test_huge_time_spline_df_is_a_message(command, tmp_path, capsys):
    out = ["--json", str(tmp_path / "o.json")] if command == "fit" else \
        ["--out", str(tmp_path / "r.html")]
    rc = main([command, "demo", "--time-spline-df", "5000000", *out])
    err = capsys.readouterr().err
    assert rc == 2 and "time_spline_df == 5000000, must be from 1 to 20" in err, err


@pytest.mark.parametrize("args", [["--breaks=-50,1e6"], ["--breaks", "-50,1e6"]])
def test_negative_breaks_are_read_as_a_value(args, tmp_path, capsys):
    from app.cli import build_parser, join_negative_values

    parsed = build_parser().parse_args(join_negative_values(["summarize", "demo", *args,
                                                             "--json", "-"]))
    assert parsed.set_breaks == "-50,1e6"
    # the value reaches the data check (age 18 to 80 in the demo), not argparse's flag parser
    rc = main(["summarize", "demo", "--strata-method", "custom", "--stratify-by", "age_at_tx",
               *args, "--json", str(tmp_path / "o.json")])
    err = capsys.readouterr().err
    assert rc == 2 and "break −50 is outside the range" in err, err

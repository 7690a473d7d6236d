"""A newly loaded table resets the settings that describe one table (declared per_dataset)
and says which; the others stay as the user set them."""
from __future__ import annotations

from analysis.preparation.demo import demo_settings
from analysis.settings import DECLARED, PER_DATASET, Settings
from app import controls as ctl


def test_per_dataset_is_read_from_the_declaration():
    # the window, the covariate's transform and centring, the groups and the data cut describe
    # one table; counts such as the fewest visits do not
    for name in ("time_min", "time_max", "transform", "center", "covariate", "breaks",
                 "data_cut"):
        assert DECLARED[name].per_dataset and name in PER_DATASET
    assert "min_visits" not in PER_DATASET and "variogram_bins" not in PER_DATASET


def test_demo_choices_go_back_to_neutral_defaults_with_a_note():
    values = ctl.control_values(demo_settings().replace(min_visits=4))
    changed, notes = ctl.reset_per_dataset(values, Settings())
    after, problems = ctl.settings_from_controls({**values, **changed})
    assert problems == {}
    # the demo's window (0–60 months), log2 and median centring are gone ...
    assert after.time_min is None and after.time_max is None
    assert after.transform == "none" and after.center == "none"
    # ... and the user's own count stays
    assert after.min_visits == 4
    text = " ".join(notes)
    assert "Window to: 60 → none" in text and "Transform: log base 2 → none" in text
    assert "Centre at: cohort median → no centring" in text


def test_nothing_to_reset_says_nothing():
    changed, notes = ctl.reset_per_dataset(ctl.control_values(Settings()), Settings())
    assert changed == {} and notes == []

"""Settings: validation messages, JSON round trip, stage cache keys."""
import pytest

from analysis.errors import SettingsError
from analysis.settings import Roles, Settings


def test_json_round_trip_and_hash():
    s = Settings(origin="event-date", unit="weeks", breaks=(1, 2.5), strata_method="custom",
                 center=3, lag_width=4.0)
    back = Settings.from_json(s.to_json())
    assert back == s and hash(back) == hash(s)
    r = Roles("id", "t", "y", covariates=["a", "b"], event_date="e")
    assert Roles.from_dict(r.to_dict()) == r


@pytest.mark.parametrize("kwargs, pattern", [
    ({"origin": "start"}, r"origin == 'start', must be one of"),
    ({"min_visits": 0}, r"min_visits == 0, must be from 1 to 1000"),
    ({"min_visits": 2.5}, r"min_visits == 2.5, must be a whole number"),
    ({"transform": "sqrt"}, r"transform == 'sqrt'"),
    ({"center": "mode"}, r"center == 'mode'"),
    ({"strata_method": "custom"}, r"needs breaks"),
    ({"strata_method": "custom", "breaks": (3, 2)}, r"strictly increasing"),
    ({"time_min": 5, "time_max": 1}, r"time window \[5, 1\] is empty"),
    ({"lag_width": 0}, r"lag_width == 0, must be > 0"),
    ({"lowess_frac": 1.5}, r"lowess_frac == 1.5"),
])
def test_bad_settings_name_the_field_and_the_rule(kwargs, pattern):
    with pytest.raises(SettingsError, match=pattern):
        Settings(**kwargs)


def test_unknown_setting_is_named():
    with pytest.raises(SettingsError, match="unknown setting"):
        Settings.from_dict({"bins": 3})


def test_stage_keys_change_only_with_their_own_fields():
    # reference: the stage tables of Workbench.stage_fields (the one place stage keys are made)
    from analysis.pipeline import Workbench

    wb = Workbench()
    s = Settings()

    def key(stage, settings):
        return wb._key(stage, _Data(), None, settings)

    more_bins = s.replace(variogram_bins=20)
    assert key("subject_fits", more_bins) == key("subject_fits", s)
    assert key("residuals", more_bins) == key("residuals", s)
    assert key("variogram", more_bins) != key("variogram", s)
    fewer_visits = s.replace(min_visits=2)
    assert key("subject_fits", fewer_visits) != key("subject_fits", s)


class _Data:
    key = "same-data"


def test_json_key_is_sha1_of_sorted_json():
    # reference: hashlib.sha1 over json.dumps(sort_keys=True), computed here independently
    import hashlib
    import json

    from analysis.settings import json_key

    value = {"b": [1, 2.5], "a": None}
    expect = hashlib.sha1(json.dumps(value, sort_keys=True).encode()).hexdigest()
    assert json_key(value) == expect and json_key(value, 16) == expect[:16]


class _Odd:
    """A value no setting accepts (not a number, text, true/false or list)."""


@pytest.mark.parametrize("name", sorted(Settings.__dataclass_fields__))
def test_every_bad_value_names_its_setting(name):
    # reference: the field names of the Settings dataclass itself; each refuses a foreign object
    with pytest.raises(SettingsError) as info:
        Settings(**{name: _Odd()})
    assert info.value.field == name


def test_unknown_or_malformed_settings_name_the_settings():
    for bad in ({"bins": 3}, ["min_visits", 3]):
        with pytest.raises(SettingsError) as info:
            Settings.from_dict(bad)
        assert info.value.field == "settings"


@pytest.mark.parametrize("field, call", [
    ("strata_method", lambda: __import__("analysis.preparation.strata", fromlist=["x"]).cut_strata(
        [1.0, 2.0, 3.0], method="thirds")),
    ("transform", lambda: __import__("analysis.preparation.strata", fromlist=["x"]).transform_values(
        [1.0, 2.0], "thirds")),
])
def test_estimator_guards_say_what_settings_say(field, call):
    # reference: the message Settings itself gives for the same bad value
    with pytest.raises(SettingsError) as direct:
        call()
    with pytest.raises(SettingsError) as via_settings:
        Settings(**{field: "thirds"})
    assert direct.value.field == field
    assert str(direct.value) == str(via_settings.value)

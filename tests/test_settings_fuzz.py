"""Settings.from_dict and Roles.from_dict on arbitrary JSON-like values: a valid object or a
SettingsError, never another exception (hypothesis generates the values)."""
from __future__ import annotations

from dataclasses import fields

from hypothesis import HealthCheck, given, settings as hsettings, strategies as st

from analysis.errors import SettingsError
from analysis.settings import Roles, Settings

JSON = st.recursive(
    st.none() | st.booleans() | st.integers() | st.floats() | st.text(max_size=20),
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=8), inner,
                                                                 max_size=4),
    max_leaves=8,
)
SETTING_NAMES = [f.name for f in fields(Settings)]
ROLE_NAMES = [f.name for f in fields(Roles)]


def _mapping(names):
    """Dicts mostly keyed by real names (so validation is reached), sometimes by others."""
    key = st.sampled_from(names) | st.text(max_size=8)
    return st.dictionaries(key, JSON, max_size=6)


def _check(build, value):
    try:
        obj = build(value)
    except SettingsError as exc:
        assert str(exc)
        assert len(str(exc)) < 2000          # messages never echo a huge value whole
        return
    # a valid result round-trips through its own dict
    assert build(obj.to_dict()) == obj


@hsettings(max_examples=400, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.one_of(_mapping(SETTING_NAMES), JSON))
def test_settings_from_dict_is_valid_or_a_settings_error(value):
    _check(Settings.from_dict, value)


@hsettings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.one_of(_mapping(ROLE_NAMES), JSON))
def test_roles_from_dict_is_valid_or_a_settings_error(value):
    _check(Roles.from_dict, value)


@hsettings(max_examples=200, deadline=None)
@given(st.fixed_dictionaries({}, optional={n: JSON for n in SETTING_NAMES}))
def test_every_field_with_any_value(value):
    _check(Settings.from_dict, value)

"""The versioned rule configuration: defaults with their sources, overrides, validation."""

from __future__ import annotations

import pytest

from tracker.errors import InputError
from tracker.rules import config as rc


def test_the_defaults_are_the_documented_values():
    d = rc.DEFAULTS
    assert d.incubation_multiple == 2.0  # common practice: incubate >= 2 x RT
    assert d.fold_tolerance == 1.25  # common practice: read within 1.25-fold
    assert d.ki_shift_threshold == 6.0  # common practice: a Ki shift above ~6 singles out slow dissociators
    assert d.no_shift_ratio == 1.5  # design choice
    assert d.insurmountable_fraction == 0.8  # common practice (a >20% Emax depression)
    assert d.floor_factor == 2.0  # design choice
    assert d.assumed_kon_per_M_s == 1e6  # from memory: typical small-molecule kon 1e5-1e8 /M/s
    assert (d.kon_low_per_M_s, d.kon_high_per_M_s) == (1e5, 1e8)  # from memory, as above
    assert rc.RULES[:3] == ("residence-time-unmeasured", "affinity-underestimate", "duration-mismatch")
    assert set(rc.RULES[3:]) == {"conflicting-kinetics", "affinity-overestimate", "tight-binding-limit", "potency-below-floor"}
    assert rc.GRADES == ("high", "moderate", "low", "clear")


def test_every_default_carries_its_source_in_a_comment():
    import inspect

    source = inspect.getsource(rc.RuleConfig)
    for name in rc.FIELD_NAMES:
        block = source.split(f"    {name}:")[0].rsplit("\n\n", 1)[-1]
        assert any(tag in block for tag in ("common practice", "from memory", "design choice")), name


def test_an_override_changes_only_the_named_setting_and_accepts_text_numbers():
    cfg = rc.DEFAULTS.with_overrides({"ki-shift-threshold": "8"})
    assert cfg.ki_shift_threshold == 8.0
    assert cfg.fold_tolerance == rc.DEFAULTS.fold_tolerance
    assert rc.effective({"floor_factor": 3}, {"floor_factor": 4}).floor_factor == 4.0


@pytest.mark.parametrize(
    "override, words",
    [({"nonsense": 1}, "unknown rule setting"), ({"fold_tolerance": "abc"}, "needs a number"), ({"fold_tolerance": 1.0}, "fold > 1"),
     ({"insurmountable_fraction": 1.5}, "fraction"), ({"no_shift_ratio": 7}, "below ki_shift_threshold"),
     ({"assumed_kon_per_M_s": 1e11}, "diffusion limit"), ({"fold_moderate": 20}, "must not exceed fold_high")],
)
def test_bad_overrides_are_refused_with_one_line_messages(override, words):
    with pytest.raises(InputError) as info:
        rc.DEFAULTS.with_overrides(override)
    assert words in str(info.value) and "\n" not in str(info.value)


def test_the_version_label_names_the_ruleset_and_the_override_layers():
    assert rc.version_label() == rc.RULESET_VERSION == "krt-rules-2"
    assert rc.version_label(2, 7, 3) == "krt-rules-2+g2+p7v3"
    assert rc.version_label(0, 7, 0) == "krt-rules-2"

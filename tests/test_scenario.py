"""Scenario loading: keys, defaults, exactly-one-of rules, and clear errors."""

from __future__ import annotations

import math

import pytest

from grmc.scenario import ScenarioError, load_scenario, set_key

BASE = """
title = "test box"
[material]
temperature_K = 300.0
intrinsic_density_cm3 = 1.0e10
radiative_cm3_s = 1.0e-10
[volume]
volume_cm3 = 1.0e-15
"""


def test_minimal_defaults():
    s = load_scenario(text=BASE)
    assert s.material.auger_electron_cm6_s == 0.0
    assert s.run.trajectories == 256 and s.run.samples == 4096 and s.run.seed == 1
    assert s.run.dopants == "rounded"
    assert s.light.waveform == "steady" and s.light.generation_cm3_s == 0.0
    assert s.start.excess_pairs == 0 and s.readout is None and s.traps == ()


def test_box_volume_and_surface():
    s = load_scenario(text=BASE.replace("volume_cm3 = 1.0e-15", "size_nm = [100, 200, 50]"))
    assert math.isclose(s.volume.volume_cm3, 100e-7 * 200e-7 * 50e-7, rel_tol=1e-12)
    a, b, c = 100e-7, 200e-7, 50e-7
    assert math.isclose(s.volume.surface_area_cm2, 2 * (a * b + b * c + a * c), rel_tol=1e-12)


def test_cross_section_times_velocity():
    text = BASE + """
[[traps]]
label = "fe"
count = 2
electron_cross_section_cm2 = 3.6e-15
hole_cross_section_cm2 = 7.0e-17
thermal_velocity_cm_s = 1.0e7
"""
    trap = load_scenario(text=text).traps[0]
    assert math.isclose(trap.electron_capture_cm3_s, 3.6e-8)
    assert math.isclose(trap.hole_capture_cm3_s, 7.0e-10)


@pytest.mark.parametrize(
    "edit, section, key",
    [
        (("radiative_cm3_s = 1.0e-10", "radiative_cm3_s = -1.0"), "material", "radiative_cm3_s"),
        (("radiative_cm3_s", "radiatve_cm3_s"), "material", "radiatve_cm3_s"),
        (("volume_cm3 = 1.0e-15", "volume_cm3 = 0.0"), "volume", "volume_cm3"),
        (("volume_cm3 = 1.0e-15", "volume_cm3 = 1e-15\nsize_nm = [1, 1, 1]"), "volume",
         "volume_cm3"),
        (("temperature_K = 300.0", "temperature_K = \"hot\""), "material", "temperature_K"),
    ],
)
def test_errors_name_section_and_key(edit, section, key):
    with pytest.raises(ScenarioError) as err:
        load_scenario(text=BASE.replace(*edit))
    assert err.value.section == section
    assert key in str(err.value) and f"[{section}]" in str(err.value)


def test_misspelt_key_gets_a_hint():
    with pytest.raises(ScenarioError, match="did you mean 'radiative_cm3_s'"):
        load_scenario(text=BASE.replace("radiative_cm3_s", "radiatve_cm3_s"))


def test_unknown_section_rejected():
    with pytest.raises(ScenarioError, match="unknown key or section"):
        load_scenario(text=BASE + "\n[lihgt]\ngeneration_cm3_s = 1.0\n")


def test_duplicate_trap_label():
    trap = """
[[traps]]
label = "a"
count = 1
electron_capture_cm3_s = 1e-8
hole_capture_cm3_s = 1e-8
"""
    with pytest.raises(ScenarioError, match="duplicate trap label"):
        load_scenario(text=BASE + trap + trap)


def test_trap_needs_exactly_one_amount():
    trap = """
[[traps]]
label = "a"
count = 1
density_cm3 = 1e15
electron_capture_cm3_s = 1e-8
hole_capture_cm3_s = 1e-8
"""
    with pytest.raises(ScenarioError, match=r"\[traps.a\] density_cm3"):
        load_scenario(text=BASE + trap)


def test_not_toml_and_missing_file(tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text("title = \n")
    with pytest.raises(ScenarioError, match="not valid TOML") as err:
        load_scenario(bad)
    assert str(bad) in str(err.value)
    with pytest.raises(ScenarioError, match="no such file"):
        load_scenario(tmp_path / "missing.toml")


def test_set_key_for_sweeps():
    import tomllib

    data = tomllib.loads(BASE + """
[[traps]]
label = "a"
density_cm3 = 1e15
electron_capture_cm3_s = 1e-8
hole_capture_cm3_s = 1e-8
""")
    set_key(data, "volume.size_nm", [10.0, 10.0, 10.0])
    set_key(data, "traps.a.count", 3)
    from grmc.scenario import parse_scenario

    s = parse_scenario(data)
    assert s.volume.size_nm == (10.0, 10.0, 10.0) and s.traps[0].count == 3
    with pytest.raises(ScenarioError, match="no trap level"):
        set_key(data, "traps.b.count", 1)
    with pytest.raises(ScenarioError, match="did you mean"):
        set_key(data, "material.radiative_cm3", 1.0)


def test_scenario_where_nothing_happens_or_nothing_recombines():
    nothing = BASE.replace("radiative_cm3_s = 1.0e-10", "")
    with pytest.raises(ScenarioError, match=r"\[material\] radiative_cm3_s: no event channel"):
        load_scenario(text=nothing)
    with pytest.raises(ScenarioError, match=r"\[light\] generation_cm3_s: light makes pairs"):
        load_scenario(text=nothing + "\n[light]\ngeneration_cm3_s = 1e20\n")
    # in the dark, a trap level alone is a valid (if quiet) scenario
    trap = "\n[[traps]]\nlabel = \"t\"\ncount = 2\nelectron_capture_cm3_s = 1e-8\n" \
           "hole_capture_cm3_s = 0.0\n"
    assert load_scenario(text=nothing + trap).traps[0].count == 2

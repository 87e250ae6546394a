"""Scenario files: the shipped ones load, malformed ones fail naming file and key."""

import textwrap

import pytest

from sim_instrument.scenario import ScenarioError, list_scenarios, load_scenario

GOOD = """
name = "t"
size_nm = [100.0, 80.0]
reference_material = "SrTiO3"
[[layers]]
material = "SrTiO3"
y_max_nm = 0.0
[[layers]]
material = "PbTiO3"
[layers.polar]
b_displacement_pm = 17.0
"""


def _write(tmp_path, text, name="s.toml"):
    p = tmp_path / name
    p.write_text(textwrap.dedent(text), encoding="utf-8")
    return p


def test_shipped_scenarios_load():
    names = list_scenarios()
    assert "demo" in names
    for name in names:
        sc = load_scenario(name)
        assert sc.size_nm[0] >= 100  # several hundred nm across, so proposals lead somewhere


def test_good_file_loads(tmp_path):
    sc = load_scenario(_write(tmp_path, GOOD))
    assert sc.layers[1].polar.b_displacement_pm == 17.0
    assert sc.layers[1].polar.direction_deg == 90.0  # default


def test_misspelled_key_is_named_with_the_file(tmp_path):
    path = _write(tmp_path, GOOD.replace("b_displacement_pm", "b_displacment_pm"))
    with pytest.raises(ScenarioError) as err:
        load_scenario(path)
    msg = str(err.value)
    assert str(path) in msg
    assert "`layers.1.polar.b_displacment_pm` is not a scenario key" in msg
    assert "`layers.1.polar.b_displacement_pm` is required" in msg


def test_wrong_type_names_key_and_value(tmp_path):
    path = _write(tmp_path, GOOD.replace("size_nm = [100.0, 80.0]", 'size_nm = "big"'))
    with pytest.raises(ScenarioError, match=r"`size_nm` = 'big'"):
        load_scenario(path)


def test_out_of_range_value_is_named(tmp_path):
    path = _write(tmp_path, GOOD + "\n[instrument.probe]\nsigma_pm = -3\n")
    with pytest.raises(ScenarioError, match=r"`instrument.probe.sigma_pm` = -3"):
        load_scenario(path)


def test_unknown_material_names_key(tmp_path):
    path = _write(tmp_path, GOOD.replace('material = "PbTiO3"', 'material = "Unobtainium"'))
    with pytest.raises(ScenarioError, match=r"`layers.1.material` = 'Unobtainium' is not in the "
                                            r"material table"):
        load_scenario(path)


def test_layers_out_of_order(tmp_path):
    text = GOOD.replace('material = "PbTiO3"', 'material = "PbTiO3"\ny_max_nm = -5.0') + \
        '\n[[layers]]\nmaterial = "SrTiO3"\n'
    with pytest.raises(ScenarioError, match=r"`layers.1.y_max_nm` = -5.0 must be above"):
        load_scenario(_write(tmp_path, text))


def test_bad_toml_syntax(tmp_path):
    with pytest.raises(ScenarioError, match="not valid TOML"):
        load_scenario(_write(tmp_path, "name = \n"))


def test_unknown_scenario_name():
    with pytest.raises(ScenarioError, match="no scenario named 'nosuch'.*demo"):
        load_scenario("nosuch")


def test_ninety_degree_wall_must_be_at_45_degrees(tmp_path):
    from sim_instrument.specimen import Specimen

    text = GOOD + textwrap.dedent("""
        [[walls]]
        kind = "90"
        point_nm = [0.0, 20.0]
        angle_deg = 90.0
        half_width_nm = 1.0
    """)
    with pytest.raises(ScenarioError, match=r"`walls.0.angle_deg` = 90.0: a 90-degree wall must "
                                            r"run at 45 degrees"):
        Specimen.from_scenario(_write(tmp_path, text))


def test_a_session_folder_named_like_a_scenario_is_not_taken_for_it(tmp_path, monkeypatch):
    """`livequant demo --session demo` made ./demo, which was then read as the scenario
    file (IsADirectoryError, 0 frames).  A bare name is a shipped scenario first; a
    folder is never a scenario."""
    monkeypatch.chdir(tmp_path)
    (tmp_path / "demo").mkdir()
    assert load_scenario("demo") == load_scenario(list_scenarios_path("demo"))
    with pytest.raises(ScenarioError, match="is a folder, not a scenario file"):
        load_scenario(str(tmp_path / "demo"))
    with pytest.raises(ScenarioError, match="is a folder"):
        load_scenario("./demo")


def list_scenarios_path(name):
    from sim_instrument.scenario import SCENARIO_DIR

    return SCENARIO_DIR / f"{name}.toml"

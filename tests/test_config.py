"""Settings: source order, validation messages, default.toml in step with the code."""

import pytest

from livequant.config import (DEFAULT_TOML, ConfigError, Settings, _read_toml, load_materials,
                              load_settings)


def _flatten(tree, prefix=""):
    out = {}
    for k, v in tree.items():
        key = f"{prefix}{k}"
        if isinstance(v, dict):
            out.update(_flatten(v, key + "."))
        else:
            out[key] = v
    return out


def test_default_toml_matches_field_defaults():
    """Every key set in config/default.toml equals the built-in default, and every
    built-in default with a value appears there (commented keys have no default)."""
    toml_keys = _flatten(_read_toml(DEFAULT_TOML))
    code = _flatten(Settings().model_dump())
    for key, value in toml_keys.items():
        assert code[key] == value, key
    missing = {k for k, v in code.items() if v is not None} - set(toml_keys)
    assert not missing, f"keys with defaults not documented in default.toml: {missing}"
    text = DEFAULT_TOML.read_text()
    for key, value in code.items():
        if value is None:
            assert f"# {key.split('.')[-1]} =" in text, f"{key} not documented"


def test_source_order_cli_over_env_over_file(tmp_path):
    user = tmp_path / "user.toml"
    user.write_text("[analysis.refine]\nmax_iterations = 40\nelliptical = false\n")
    env = {"LIVEQUANT_ANALYSIS__REFINE__MAX_ITERATIONS": "50"}
    s = load_settings(user, environ=env)
    assert s.analysis.refine.max_iterations == 50 and s.analysis.refine.elliptical is False
    s = load_settings(user, environ=env, overrides={"analysis.refine.max_iterations": 60})
    assert s.analysis.refine.max_iterations == 60


def test_unknown_key_is_an_error_naming_it(tmp_path):
    user = tmp_path / "u.toml"
    user.write_text("[analysis.detection]\ntreshold_rel = 0.2\n")
    with pytest.raises(ConfigError, match="analysis.detection.treshold_rel"):
        load_settings(user, environ={})


def test_invalid_value_names_key_value_and_rule():
    with pytest.raises(ConfigError) as exc:
        load_settings(environ={}, overrides={"analysis.refine.max_iterations": 0})
    msg = str(exc.value)
    assert "analysis.refine.max_iterations" in msg and "0" in msg and "greater than" in msg
    with pytest.raises(ConfigError, match="weighting"):
        load_settings(environ={}, overrides={"analysis.refine.weighting": "chi2"})


def test_bad_toml_file_is_reported(tmp_path):
    bad = tmp_path / "b.toml"
    bad.write_text("[analysis\n")
    with pytest.raises(ConfigError, match="not valid TOML"):
        load_settings(bad, environ={})
    with pytest.raises(ConfigError, match="does not exist"):
        load_settings(tmp_path / "none.toml", environ={})


def test_materials_table_has_sources_and_consistent_values():
    table = load_materials()
    # CHECK-VALUES section 1: SrTiO3 a = 3.9053 A (IUCr sh5025); PbTiO3 a = 3.8987, c = 4.1380 A
    assert table["SrTiO3"].a_pm == pytest.approx(390.53)
    assert table["PbTiO3"].c_pm / table["PbTiO3"].a_pm == pytest.approx(1.0614, abs=2e-4)
    # Born charges (Zhong et al. PRL 72, 3618 (1994)): acoustic sum ~ 0 per cell
    for name in ("PbTiO3", "BaTiO3"):
        m = table[name]
        total = m.born_a + m.born_b + m.born_o_par + 2 * m.born_o_perp
        assert abs(total) < 0.02, name
    assert table["PbTiO3"].p_sign_b_vs_a == -1 and table["BaTiO3"].p_sign_b_vs_a == 1
    for m in table.values():
        assert m.source and m.status


def test_region_strain_reference_needs_a_valid_region():
    from livequant.config import ConfigError, load_settings

    with pytest.raises(ConfigError, match="reference_region_px"):
        load_settings(overrides={"analysis.cells.reference": "region"})
    with pytest.raises(ConfigError, match="x1 > x0"):
        load_settings(overrides={"analysis.cells.reference": "region",
                                 "analysis.cells.reference_region_px": [10, 0, 5, 10]})
    s = load_settings(overrides={"analysis.cells.reference": "region",
                                 "analysis.cells.reference_region_px": [0, 0, 100, 50]})
    assert s.analysis.cells.reference_region_px == (0, 0, 100, 50)


def test_ledger_side_proposals_reads_the_configured_beam_current(tmp_path, monkeypatch):
    """`livequant proposals` without a daemon reads proposals.beam_current_pa from the
    raw configuration (no schema import): the user's file, then the environment; a
    value that is not a positive number counts as unknown (`run` rejects it in full)."""
    from livequant.commands.proposals import _configured_current

    cfg = tmp_path / "mine.toml"
    cfg.write_text("[proposals]\nbeam_current_pa = 35\n")
    monkeypatch.setenv("LIVEQUANT_CONFIG", str(cfg))
    assert _configured_current() == 35.0
    monkeypatch.setenv("LIVEQUANT_PROPOSALS__BEAM_CURRENT_PA", "12.5")
    assert _configured_current() == 12.5
    monkeypatch.setenv("LIVEQUANT_PROPOSALS__BEAM_CURRENT_PA", "-1")
    assert _configured_current() is None
    cfg.write_text("[proposals\n")                     # not TOML: unknown, not a traceback
    monkeypatch.delenv("LIVEQUANT_PROPOSALS__BEAM_CURRENT_PA")
    assert _configured_current() is None

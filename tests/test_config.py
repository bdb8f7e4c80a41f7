"""Configuration: validation errors name the key and suggest fixes; defaults are documented."""

from __future__ import annotations

import dataclasses
import re
from pathlib import Path

import pytest

from selector.settings import config as cfgmod
from selector.settings.validate import to_plain
from selector.settings.config import config_hash, load_config
from selector.errors import ConfigError

from conftest import base_config, build

CONFIGS = Path(__file__).resolve().parents[1] / "configs"


def test_base_config_is_valid():
    cfg = build(base_config())
    assert cfg.match.radius_arcsec == 4.0 and cfg.match.method == "probabilistic"
    assert cfg.epoch_difference_yr == pytest.approx(-6.0)


def test_unknown_key_suggests_nearest():
    data = base_config()
    data["match"] = {"radius_arcsecs": 2.0}
    with pytest.raises(ConfigError, match=r"unknown key 'match.radius_arcsecs' \(did you mean 'radius_arcsec'\?\)"):
        build(data)


def test_unknown_section_suggests_nearest():
    data = base_config()
    data["motoin"] = {}
    with pytest.raises(ConfigError, match=r"did you mean 'motion'"):
        build(data)


def test_unknown_role_suggests_nearest():
    data = base_config()
    data["astrometric"]["columns"]["paralax"] = "x"
    with pytest.raises(ConfigError, match=r"unknown role 'astrometric.columns.paralax' \(did you mean 'parallax'\?\)"):
        build(data)


def test_wrong_type_names_key_and_value():
    data = base_config()
    data["match"] = {"radius_arcsec": "two"}
    with pytest.raises(ConfigError, match=r"match.radius_arcsec = 'two' has the wrong type; expected a number"):
        build(data)


def test_out_of_range_names_allowed_range():
    data = base_config()
    data["motion"] = {"pm_pvalue_min": 1.5}
    with pytest.raises(ConfigError, match=r"motion.pm_pvalue_min = 1.5 is out of range; it must be at most 1.0"):
        build(data)


def test_choice_lists_allowed_values():
    data = base_config()
    data["colours"] = {"combine": "either"}
    with pytest.raises(ConfigError, match=r"colours.combine = 'either' is not allowed; choose one of 'any', 'all'"):
        build(data)


def test_missing_required_role():
    data = base_config()
    del data["astrometric"]["columns"]["parallax"]
    with pytest.raises(ConfigError, match=r"missing the required role 'parallax'"):
        build(data)


def test_missing_epoch():
    data = base_config()
    del data["infrared"]["epoch_jyear"]
    with pytest.raises(ConfigError, match=r"\[infrared\] needs epoch_jyear"):
        build(data)


def test_bad_unit_and_inconvertible_unit():
    data = base_config()
    data["astrometric"]["columns"]["ra"] = {"column": "ra", "unit": "furlongs"}
    with pytest.raises(ConfigError, match=r"astrometric.columns.ra.unit = 'furlongs' is not a unit"):
        build(data)
    data["astrometric"]["columns"]["ra"] = {"column": "ra", "unit": "mas / yr"}
    with pytest.raises(ConfigError, match=r"cannot be converted to deg"):
        build(data)


def test_unknown_criterion_suggests():
    data = base_config()
    data["colours"] = {"criteria": ["stern2021"]}
    with pytest.raises(ConfigError, match=r"did you mean 'stern2012'"):
        build(data)


def test_infrared_band_must_be_known():
    data = base_config()
    data["infrared"]["magnitudes"][0]["band"] = "3.5"
    with pytest.raises(ConfigError, match=r"is not an infrared band"):
        build(data)


def test_vega_optical_band_needs_offset():
    data = base_config()
    data["astrometric"]["magnitudes"][0]["system"] = "vega"
    with pytest.raises(ConfigError, match=r"vega_to_ab_mag"):
        build(data)


def test_radius_too_large_for_order_is_refused():
    data = base_config()
    data["tiling"] = {"order": 11}
    data["match"] = {"radius_arcsec": 60.0}
    with pytest.raises(ConfigError, match=r"more than tiling.order = 11 allows"):
        build(data)


def test_linear_cut_must_name_bands_of_the_config():
    data = base_config()
    data["colours"] = {"linear_cuts": [{"name": "c", "y": ["3.4", "12"], "x": ["4.6"], "slope": 0.0,
                                        "intercept": 0.5}]}
    with pytest.raises(ConfigError, match=r"names '12', which is not a band of this configuration"):
        build(data)


def test_config_file_errors_name_the_file(tmp_path):
    p = tmp_path / "bad.toml"
    p.write_text("[match\nradius_arcsec = 2")
    with pytest.raises(ConfigError, match=r"bad.toml: not valid TOML"):
        load_config(p)
    with pytest.raises(ConfigError, match=r"no such configuration file"):
        load_config(tmp_path / "missing.toml")


def test_hash_is_canonical_and_portable(tmp_path):
    a = build(base_config(), tmp_path)
    b = build(base_config(), tmp_path / "elsewhere")
    assert config_hash(a) == config_hash(b)  # the base folder is not part of the hash
    data = base_config()
    data["match"] = {"radius_arcsec": 2.5}
    assert config_hash(build(data)) != config_hash(a)
    # a change of a selection cut leaves the matching hash alone
    data = base_config()
    data["motion"] = {"parallax_snr_max": 4.0}
    assert config_hash(build(data), cfgmod.MATCH_SECTIONS) == config_hash(a, cfgmod.MATCH_SECTIONS)


def test_shipped_configs_load():
    load_config(CONFIGS / "default.toml")
    load_config(CONFIGS / "demo.toml")


def _keys(obj, prefix=""):
    for f in dataclasses.fields(obj):
        if f.name == "base_dir":
            continue
        value = getattr(obj, f.name)
        if dataclasses.is_dataclass(value):
            yield from _keys(value, f"{prefix}{f.name}.")
        else:
            yield prefix + f.name


def test_default_toml_documents_every_settings_key():
    text = (CONFIGS / "default.toml").read_text()
    section_classes = {"project": cfgmod.ProjectConfig, "tiling": cfgmod.TilingConfig, "match": cfgmod.MatchConfig,
                       "motion": cfgmod.MotionConfig, "quality": cfgmod.QualityConfig, "colours": cfgmod.ColourConfig,
                       "ranking": cfgmod.RankingConfig, "classifier": cfgmod.ClassifierConfig,
                       "run": cfgmod.RunConfig, "astrometric": cfgmod.CatalogueConfig,
                       "targets": cfgmod.TargetsConfig, "physics": cfgmod.PhysicsConfig}
    for section, cls in section_classes.items():
        assert f"[{section}]" in text, section
        for f in dataclasses.fields(cls):
            # each key appears as "key =", a "[section.key]" table, or commented out
            pattern = rf"^#?\s*({f.name}\s*=|\[\[?{section}\.{f.name}\]\]?)"
            assert re.search(pattern, text, re.M), f"{section}.{f.name} undocumented"
    for cls in (cfgmod.MagnitudeSpec, cfgmod.LinearCutSpec, cfgmod.OpticalInfraredCut, cfgmod.SiteConfig,
                cfgmod.PriorityConfig):
        for f in dataclasses.fields(cls):
            assert re.search(rf"^#?\s*{f.name}\s*=", text, re.M), f"{cls.__name__}.{f.name} undocumented"


def test_default_toml_values_equal_code_defaults():
    cfg = load_config(CONFIGS / "default.toml")
    for section in ("project", "tiling", "match", "motion", "quality", "colours", "ranking", "classifier", "run", "physics"):
        written = to_plain(getattr(cfg, section))
        default = to_plain(getattr(cfgmod, type(getattr(cfg, section)).__name__)())
        assert written == default, section

"""``selector weigh``: black-hole masses from a spectroscopy file.

Check values are computed here from the published relations, not by calling the code twice:
single-epoch virial masses ``log M = a + b log(λL/1e44) + 2 log(FWHM/1000)`` with Hβ and C IV from
Vestergaard & Peterson 2006, ApJ 641, 689 and Mg II from Vestergaard & Osmer 2009, ApJ 699, 800
(coefficients from memory); bolometric corrections of Richards et al. 2006, AJ 131, 2766 (from memory);
the Eddington luminosity of Rybicki & Lightman 1979 written out with astropy.constants; the
accretion-rate scaling ``Ṁ = 1.766 M☉/yr (L_bol/1e46)(0.1/η)`` (common practice, from ``L = η Ṁ c²``).
"""

from __future__ import annotations

import math

import astropy.constants as const
import astropy.units as u
import numpy as np
import pytest
from astropy.cosmology import Planck18
from astropy.io.votable import parse
from astropy.table import Table

from selector import api
from selector.cli import main
from selector.errors import ConfigError
from selector.jobs.weigh import REASONS
from selector.settings.config import config_hash
from selector.store.io import read_table
from selector.store.keys import result_config, selection_key
from selector.store.layout import weigh_dir

from conftest import base_config, build

LN10 = math.log(10.0)

# (a, b, intrinsic scatter in dex), from memory:
CIV_VP06 = (6.66, 0.53, 0.36)     # Vestergaard & Peterson 2006, ApJ 641, 689, eq. 7
HBETA_VP06 = (6.91, 0.50, 0.43)   # Vestergaard & Peterson 2006, ApJ 641, 689, eq. 5
MGII_VO09 = (6.86, 0.50, 0.55)    # Vestergaard & Osmer 2009, ApJ 699, 800, eq. 1


def log_mass(cal, lamL, fwhm):
    a, b, _ = cal
    return a + b * math.log10(lamL / 1e44) + 2.0 * math.log10(fwhm / 1000.0)


HEADER = ("astro_id,redshift,fwhm_civ_kms,fwhm_civ_err_kms,lamL1350_erg_s,lamL1350_err_erg_s,"
          "fwhm_mgii_kms,fwhm_mgii_err_kms,lamL3000_erg_s,lamL3000_err_erg_s,"
          "fwhm_hbeta_kms,fwhm_hbeta_err_kms,lamL5100_erg_s,lamL5100_err_erg_s,fnu3000_mjy")
GOOD_ROWS = [
    "101,2.5,5000,250,1e46,1e45,,,,,,,,,",            # C IV only
    "102,0.3,,,,,3500,175,1e45,1e44,4000,200,1e45,5e43,",  # Mg II and Hβ: Hβ is adopted
    "103,1.1,,,,,3500,100,1e45,,,,,,",                 # Mg II only, no luminosity error
    "104,1.5,,,,,3500,,,,,,,,0.5",                     # Mg II with a flux density to convert
]


@pytest.fixture
def cfg(tmp_path):
    return build(base_config(), tmp_path)


def write_csv(path, rows):
    path.write_text(HEADER + "\n" + "\n".join(rows) + "\n")
    return path


def by_id(table, ident):
    rows = table[table["astro_id"] == str(ident)]
    assert len(rows) == 1
    return rows[0]


@pytest.mark.parametrize("fmt", ["csv", "ecsv"])
def test_masses_match_the_published_relations(cfg, tmp_path, fmt):
    path = write_csv(tmp_path / "spectra.csv", GOOD_ROWS)
    if fmt == "ecsv":
        t = Table.read(path, format="ascii.csv")
        for name in t.colnames:
            if name.startswith("fwhm"):
                t[name] = t[name] * 1000.0
                t[name].unit = "m / s"   # a declared unit is converted to the one the name says
        path = tmp_path / "spectra.ecsv"
        t.write(path, format="ascii.ecsv")
    lines = []
    result = api.weigh(cfg, path, log=lines.append)
    assert len(lines) == 1 and "weighed 4 of 4 rows" in lines[0]
    assert (result.rows_in, result.accepted, result.rejected) == (4, 4, 0)
    m = result.masses

    civ = by_id(m, 101)
    assert civ["log_mass_civ_msun"] == pytest.approx(9.118, abs=5e-4)  # C IV 5000 km/s at 1e46 (VP06, from memory)
    assert civ["log_mass_civ_msun"] == pytest.approx(log_mass(CIV_VP06, 1e46, 5000.0), abs=1e-9)
    assert civ["adopted_line"] == "CIV"
    assert civ["lbol_erg_s"] == pytest.approx(3.81 * 1e46, rel=1e-12)   # BC(1350) = 3.81 (Richards et al. 2006)

    both = by_id(m, 102)
    assert both["log_mass_hbeta_msun"] == pytest.approx(8.614, abs=5e-4)  # Hβ 4000 km/s at 1e45 (VP06, from memory)
    assert both["log_mass_mgii_msun"] == pytest.approx(8.448, abs=5e-4)   # Mg II 3500 km/s at 1e45 (VO09, from memory)
    assert both["log_mass_mgii_msun"] == pytest.approx(log_mass(MGII_VO09, 1e45, 3500.0), abs=1e-9)
    assert both["adopted_line"] == "Hbeta" and both["log_mass_msun"] == both["log_mass_hbeta_msun"]
    assert both["continuum_angstrom"] == 5100.0
    assert both["lbol_erg_s"] == pytest.approx(9.26e45, rel=1e-12)       # BC(5100) = 9.26 (Richards et al. 2006)
    assert both["mass_msun"] == pytest.approx(4.11e8, rel=1e-3)
    # Eddington ratio of 4.11e8 Msun at L_bol = 9.26e45 erg/s: 0.179 (design notes, from memory), and
    # written out from L_Edd = 4π G M m_p c / σ_T (Rybicki & Lightman 1979)
    l_edd = 4 * math.pi * const.G.cgs.value * const.M_sun.cgs.value * const.m_p.cgs.value * const.c.cgs.value \
        / const.sigma_T.cgs.value
    assert both["eddington_ratio"] == pytest.approx(0.179, abs=1e-3)
    assert both["eddington_ratio"] == pytest.approx(9.26e45 / (l_edd * both["mass_msun"]), rel=1e-9)
    # Ṁ = 1.766 Msun/yr × (L_bol/1e46)(0.1/η) (common practice), over the default η range [0.057, 0.32]
    assert both["mdot_high_msun_yr"] == pytest.approx(1.766 * 0.926 * 0.1 / 0.057, rel=1e-3)
    assert both["mdot_low_msun_yr"] == pytest.approx(1.766 * 0.926 * 0.1 / 0.32, rel=1e-3)
    assert both["mdot_high_msun_day"] == pytest.approx(both["mdot_high_msun_yr"] / 365.25, rel=1e-9)

    # errors and intrinsic scatter side by side, never merged
    sigma_l = 5e43 / (1e45 * LN10)
    sigma_w = 2 * 200.0 / (4000.0 * LN10)
    assert both["log_mass_hbeta_meas_err_dex"] == pytest.approx(math.hypot(0.5 * sigma_l, sigma_w), rel=1e-9)
    assert both["log_mass_hbeta_scatter_dex"] == HBETA_VP06[2]
    assert both["log_mass_meas_err_dex"] == both["log_mass_hbeta_meas_err_dex"]
    assert both["log_mass_scatter_dex"] == HBETA_VP06[2]
    assert civ["log_mass_civ_scatter_dex"] == CIV_VP06[2]
    assert not any("total" in name for name in m.colnames)
    assert np.isnan(by_id(m, 103)["log_mass_mgii_meas_err_dex"])   # no luminosity error: unknown, not zero
    assert by_id(m, 103)["log_mass_mgii_scatter_dex"] == MGII_VO09[2]

    # a flux density at rest 3000 Å becomes λL = ν 4π d_L² f_ν / (1+z), d_L from astropy's Planck18
    flux = by_id(m, 104)
    nu = (const.c / (3000 * u.AA)).to_value(u.Hz)
    d_cm = Planck18.luminosity_distance(1.5).to_value(u.cm)
    expected = nu * 4 * math.pi * d_cm**2 * 0.5e-26 / 2.5
    assert flux["lamL3000_source"] == "fnu"
    assert flux["lamL3000_erg_s"] == pytest.approx(expected, rel=1e-9)
    assert flux["log_mass_mgii_msun"] == pytest.approx(log_mass(MGII_VO09, expected, 3500.0), abs=1e-9)


def test_bad_rows_are_rejected_with_reasons_and_counts_add_up(cfg, tmp_path):
    path = tmp_path / "bad.csv"
    header = HEADER + ",fwhm_oiii_kms"
    rows = [
        "201,2.5,5000,250,1e46,1e45,,,,,,,,,,",        # good
        "202,2.5,-300,,1e46,,,,,,,,,,,",                 # negative width
        "203,2.5,inf,,1e46,,,,,,,,,,,",                  # non-finite width
        "204,2.5,5000,,,,,,,,,,,,,",                     # no continuum for C IV
        "205,,,,,,3500,,,,,,,,0.5,",                     # flux density but no redshift
        "206,-1,,,,,3500,,1e45,,,,,,,",                  # invalid redshift
        "207,1.0,,,,,,,,,,,,,,500",                      # a width only of a line without a calibration
        "208,1.0,,,,,,,,,,,,,,",                         # no width at all
        "209,1.0,5000,-5,1e46,,,,,,,,,,,",               # negative width error
        "210,1.0,5000,,1e46,,,,,,,,,,,",                 # duplicate id (both rejected)
        "210,1.0,5000,,1e46,,,,,,,,,,,",
        ",1.0,5000,,1e46,,,,,,,,,,,",                    # no id
        "213,1.0,five thousand,,1e46,,,,,,,,,,,",        # not a number
        "214,1.0,5000,,0,,,,,,,,,,,",                    # zero luminosity
        "215,1.0,5000,250,1e46,1e45,4000,200,,,,,,,,",   # good C IV, but Mg II without its continuum
    ]
    path.write_text(header + "\n" + "\n".join(rows) + "\n")
    lines = []
    result = api.weigh(cfg, path, log=lines.append)
    assert len(lines) == 1 and "rejected 14" in lines[0] and "fwhm_oiii_kms" in lines[0]
    assert result.rows_in == len(rows) == result.accepted + result.rejected
    assert len(result.masses) == result.accepted == 1 and len(result.rejects) == result.rejected
    assert sum(result.reasons.values()) == result.rejected
    got = {int(r["input_row"]): (str(r["reason"]), str(r["column"])) for r in result.rejects}
    assert got == {
        2: ("fwhm_not_positive", "fwhm_civ_kms"),
        3: ("fwhm_not_finite", "fwhm_civ_kms"),
        4: ("luminosity_missing", "lamL1350_erg_s"),
        5: ("redshift_missing", "redshift"),
        6: ("redshift_invalid", "redshift"),
        7: ("line_unknown", "fwhm_oiii_kms"),
        8: ("line_missing", ""),
        9: ("fwhm_error_invalid", "fwhm_civ_err_kms"),
        10: ("id_duplicate", "astro_id"),
        11: ("id_duplicate", "astro_id"),
        12: ("id_missing", "astro_id"),
        13: ("not_a_number", "fwhm_civ_kms"),
        14: ("luminosity_not_positive", "lamL1350_erg_s"),
        15: ("luminosity_missing", "lamL3000_erg_s"),
    }
    assert set(r for r, _ in got.values()) <= set(REASONS)
    on_disk = Table.read(result.outputs["rejects"], format="ascii.ecsv")
    assert len(on_disk) == result.rejected and list(on_disk["reason"]) == list(result.rejects["reason"])


def test_outputs_have_units_provenance_and_stable_bytes(cfg, tmp_path):
    path = write_csv(tmp_path / "spectra.csv", GOOD_ROWS)
    result = api.weigh(cfg, path, log=lambda line: None)
    assert set(result.outputs) == {"ecsv", "votable", "parquet", "rejects"}
    assert all(p.parent == weigh_dir(cfg) == tmp_path / "out" / "physics" for p in result.outputs.values())
    first = {k: p.read_bytes() for k, p in result.outputs.items()}
    api.weigh(cfg, path, log=lambda line: None)
    assert {k: p.read_bytes() for k, p in result.outputs.items()} == first   # no clock in any file
    assert not list(weigh_dir(cfg).glob(".*.tmp"))

    ecsv = Table.read(result.outputs["ecsv"], format="ascii.ecsv")
    assert ecsv["lbol_erg_s"].unit == u.erg / u.s and ecsv["fwhm_civ_kms"].unit == u.km / u.s
    assert ecsv["log_mass_msun"].description and ecsv["mdot_high_msun_yr"].unit == u.Msun / u.yr
    prov = ecsv.meta["selector_provenance"]
    assert prov["physics_config_hash"] == config_hash(cfg, ("physics",))
    assert prov["input"]["file"] == "spectra.csv" and prov["input"]["fingerprint"]
    assert prov["selector_version"]

    vot = parse(str(result.outputs["votable"]))     # astropy's own VOTable parser
    table = vot.get_first_table()
    units = {f.name: f.unit for f in table.fields}
    assert u.Unit(units["lbol_erg_s"]) == u.erg / u.s       # written the VOUnit way, the same unit
    assert u.Unit(units["mass_msun"]) == u.Msun
    assert u.Unit(units["fwhm_hbeta_kms"]) == u.km / u.s
    assert any(i.name == "selector_provenance" for i in table.infos)
    assert len(table.to_table()) == 4

    arrow, file_units = read_table(result.outputs["parquet"])
    assert arrow.num_rows == 4 and file_units["lbol_erg_s"] == "erg / s"


def test_unknown_cosmology_is_a_one_line_config_error(tmp_path):
    data = base_config()
    data["physics"] = {"cosmology": "Plank18"}
    with pytest.raises(ConfigError) as exc:
        build(data, tmp_path)
    message = str(exc.value)
    assert "\n" not in message and message.startswith("physics.cosmology") and "Planck18" in message
    data["physics"] = {"cosmology": "flat", "h0_km_s_mpc": 70.0}
    with pytest.raises(ConfigError, match="omega_m"):
        build(data, tmp_path)
    data["physics"] = {"h0_km_s_mpc": 70.0, "omega_m": 0.3}
    with pytest.raises(ConfigError, match='only with cosmology = "flat"'):
        build(data, tmp_path)
    data["physics"] = {"bolometric_corrections": {"1350": 3.81, "3000": 5.15}}
    with pytest.raises(ConfigError, match="5100"):
        build(data, tmp_path)
    data["physics"] = {"efficiency_range": [0.3, 0.1]}
    with pytest.raises(ConfigError, match="efficiency_range"):
        build(data, tmp_path)
    data["physics"] = {"virial_calibrations": "newest"}
    with pytest.raises(ConfigError, match="baseline"):
        build(data, tmp_path)
    data["physics"] = {"cosmology": "flat", "h0_km_s_mpc": 70.0, "omega_m": 0.3, "extinction": {"broad": 2.7}}
    assert build(data, tmp_path).physics.astropy_cosmology().H0.value == 70.0


def test_physics_leaves_run_provenance_alone(tmp_path):
    # the virial calibrations are read only by `selector weigh`: a run's recorded config and keys ignore
    # them; the cosmology changes the candidates' luminosities, so a run records it
    data = base_config()
    plain_cfg = build(data, tmp_path)
    data["physics"] = {"virial_calibrations": "mgii_2011"}
    other = build(data, tmp_path)
    assert "virial_calibrations" not in result_config(plain_cfg)["physics"]
    assert result_config(plain_cfg) == result_config(other)
    assert selection_key(plain_cfg, None) == selection_key(other, None)
    data["physics"] = {"cosmology": "flat", "h0_km_s_mpc": 70.0, "omega_m": 0.3}
    other = build(data, tmp_path)
    assert result_config(plain_cfg) != result_config(other)
    assert selection_key(plain_cfg, None) != selection_key(other, None)
    assert config_hash(plain_cfg, ("physics",)) != config_hash(other, ("physics",))


def _toml(tmp_path):
    path = tmp_path / "c.toml"
    path.write_text(
        '[project]\noutput_dir = "out"\n'
        '[astrometric]\nfiles = ["a.parquet"]\nepoch_jyear = 2016.0\nposition_floor_arcsec = 0.001\n'
        '[astrometric.columns]\n'
        + "".join(f'{k} = "{v}"\n' for k, v in base_config()["astrometric"]["columns"].items())
        + '[infrared]\nfiles = ["ir.parquet"]\nepoch_jyear = 2010.0\nposition_floor_arcsec = 0.8\n[infrared.columns]\nid = "a"\nra = "b"\ndec = "c"\n'
        '[[infrared.magnitudes]]\nband = "3.4"\ncolumn = "m3p4"\n[[infrared.magnitudes]]\nband = "4.6"\ncolumn = "m4p6"\n')
    return path


def test_command_prints_one_line_and_exits_2_on_bad_input(tmp_path, capsys):
    config = _toml(tmp_path)
    spectra = write_csv(tmp_path / "spectra.csv", GOOD_ROWS)
    assert main(["weigh", "--config", str(config), "--file", str(spectra)]) == 0
    out = capsys.readouterr()
    assert len(out.out.strip().splitlines()) == 1 and "weighed 4 of 4 rows" in out.out
    assert (tmp_path / "out" / "physics" / "spectra_masses.vot").is_file()

    no_width = tmp_path / "nowidth.csv"
    no_width.write_text("astro_id,redshift\n1,2.0\n")
    assert main(["weigh", "--config", str(config), "--file", str(no_width)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("selector: ") and "fwhm_civ_kms" in err[0]

    assert main(["weigh", "--config", str(config), "--file", str(tmp_path / "absent.csv")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "absent.csv" in err[0] and "Traceback" not in err[0]

"""The solvent table, user-defined solvents and the liquid-range warnings.

Handbook values below are from memory (CRC Handbook and suppliers' deuterated-solvent charts); only
facts we are sure of are tested, with tolerances that say how sure.
"""
from __future__ import annotations

import pytest

from dnmr.errors import InputError
from dnmr.planning.solvents import (BUILTIN_SOLVENTS, Solvent, check_temperature, check_temperatures, load_solvents, solvent,
                           solvent_from_options, solvents_covering)

C = 273.15


def test_heavy_water_melts_at_3_8_and_boils_at_101_4_celsius():
    # Handbook values, from memory: D2O mp 3.8 deg C, bp 101.4 deg C.
    d2o = solvent("D2O")
    assert d2o.melting_point_k == pytest.approx(3.8 + C, abs=0.05)
    assert d2o.boiling_point_k == pytest.approx(101.4 + C, abs=0.05)


@pytest.mark.parametrize("name, kind, celsius, tolerance", [
    ("CDCl3", "boiling", 61.0, 1.0),          # from memory: chloroform(-d) boils near 61 deg C
    ("CD2Cl2", "boiling", 40.0, 1.0),         # from memory: dichloromethane boils near 40 deg C
    ("CD3OD", "boiling", 65.0, 1.5),          # from memory: methanol boils near 65 deg C
    ("DMSO-d6", "melting", 19.0, 1.5),        # from memory: DMSO freezes at 18-20 deg C (solid in a cold lab)
    ("C6D6", "melting", 6.0, 1.5),            # from memory: benzene freezes at 5.5-7 deg C
    ("toluene-d8", "boiling", 110.5, 1.5),    # from memory: toluene boils near 110-111 deg C
])
def test_handbook_values(name, kind, celsius, tolerance):
    entry = solvent(name)
    value = entry.boiling_point_k if kind == "boiling" else entry.melting_point_k
    assert value - C == pytest.approx(celsius, abs=tolerance)


def test_every_builtin_solvent_is_a_liquid_at_the_bench():
    # Common practice: NMR solvents are liquids at 25 deg C; the highest melting of the table
    # (DMSO-d6, acetic acid-d4) melt below it and the most volatile (diethyl ether-d10) boils above it.
    for entry in BUILTIN_SOLVENTS:
        assert entry.melting_point_k < 25 + C < entry.boiling_point_k, entry.name


@pytest.mark.parametrize("text", ["cdcl3", "Chloroform-D", "chloroform d", "CDCl3"])
def test_lookup_ignores_case_blanks_and_uses_formulae(text):
    assert solvent(text).name == "chloroform-d"


def test_unknown_solvent_suggests_a_close_name():
    with pytest.raises(InputError, match='did you mean "CDCl3"'):
        solvent("CDCl4")


@pytest.mark.parametrize("celsius, kind", [
    (-5.0, "frozen"), (8.0, "near freezing"), (50.0, None), (95.0, "near boiling"), (110.0, "above boiling"),
])
def test_warnings_near_freezing_and_boiling(celsius, kind):
    warning = check_temperature(solvent("D2O"), celsius + C, margin_k=10.0)
    assert (warning.kind if warning else None) == kind


def test_margin_and_several_temperatures():
    cdcl3 = solvent("CDCl3")
    assert check_temperature(cdcl3, cdcl3.boiling_point_k - 4.0, margin_k=3.0) is None
    warnings = check_temperatures(cdcl3, [200.0, 250.0, 330.0, 340.0])
    assert [w.kind for w in warnings] == ["frozen", "near boiling", "above boiling"]
    assert "burst" in warnings[-1].message


def test_covering_solvents():
    # From memory: toluene-d8 is liquid from about -95 to 111 deg C, chloroform-d boils near 61 deg C.
    names = [s.name for s in solvents_covering(230.0, 350.0)]
    assert "toluene-d8" in names and "chloroform-d" not in names


def test_user_defined_solvents_from_a_file(tmp_path):
    path = tmp_path / "solvents.toml"
    path.write_text('[[solvent]]\nname = "lab mixture A"\nmelting_point_c = -120.0\nboiling_point_k = 300.0\n')
    (mine,) = load_solvents(path)
    assert mine.melting_point_k == pytest.approx(153.15)
    assert solvent("Lab Mixture A", [mine]) is mine
    assert solvent_from_options("lab mixture A", path).boiling_point_k == 300.0


@pytest.mark.parametrize("body, where", [
    ('[[solvent]]\nname = "x"\nmelting_point_k = 300.0\nboiling_point_k = 200.0\n', "melting_point_k"),
    ('[[solvent]]\nname = "x"\nboiling_point_k = 300.0\n', "melting_point_k"),
    ('[[solvent]]\nname = "x"\nmelting_point = 100\nboiling_point_k = 300.0\n', "melting_point"),
    ('[solvent]\nname = "x"\n', "solvent"),
])
def test_bad_solvent_file_names_file_and_key(tmp_path, body, where):
    path = tmp_path / "bad.toml"
    path.write_text(body)
    with pytest.raises(InputError) as err:
        load_solvents(path)
    assert "bad.toml" in str(err.value) and where in str(err.value)


def test_options_for_your_own_solvent():
    mine = solvent_from_options(None, None, 150.0, 320.0)
    assert isinstance(mine, Solvent) and mine.liquid_range_k(10.0) == (160.0, 310.0)
    assert solvent_from_options() is None
    with pytest.raises(InputError, match="both"):
        solvent_from_options(None, None, 150.0, None)

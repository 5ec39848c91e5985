"""Line file and structures CSV validation (clearaudit.config)."""
from __future__ import annotations

import pytest

from clearaudit.config import load_line_file, read_structures_csv
from clearaudit.errors import InputError


def write(tmp_path, text, name="line.toml"):
    p = tmp_path / name
    p.write_text(text)
    return p


def test_defaults_without_file():
    cfg = load_line_file(None)
    assert cfg.line.voltage_kv is None
    assert cfg.phase.name == "795 26/7 ACSR"
    assert cfg.survey.conductor_temperature_uncertainty_c == 5.0


def test_full_file(tmp_path):
    (tmp_path / "s.csv").write_text("id,x,y,type\nA1,0,0,deadend\nA2,300,5,suspension\n")
    p = write(tmp_path, """
[line]
name = "Test line"
voltage_kv = 230
max_operating_temperature_c = 93
[survey]
conductor_temperature_c = 31.5
[conductors.phase]
name = "Drake"
bundle = 2
weight_n_per_m = 16.1
[conductors.shield]
name = "3/8 EHS"
[clearance]
vegetation_m = 4.5
[structures]
file = "s.csv"
[classification]
trust_classes = true
""")
    cfg = load_line_file(p)
    assert cfg.line.voltage_kv == 230 and cfg.line.max_operating_temperature_c == 93
    assert cfg.phase.bundle == 2 and cfg.phase.overrides == {"weight_n_per_m": 16.1}
    assert cfg.clearance == {"vegetation_m": 4.5}
    assert cfg.structures_file == tmp_path / "s.csv"
    assert cfg.trust_classes is True
    rows = read_structures_csv(cfg.structures_file)
    assert [r["type"] for r in rows] == ["deadend", "suspension"]
    assert cfg.to_dict()["line"]["name"] == "Test line"


@pytest.mark.parametrize("text, fragment", [
    ("[line]\nvoltge_kv = 230\n", "unknown key 'voltge_kv'"),
    ("[lines]\n", "unknown section"),
    ("[line]\nvoltage_kv = 'high'\n", "must be a number"),
    ("[line\n", "not a valid TOML"),
    ("[conductors.neutral]\nname='x'\n", "unknown conductor role"),
    ("[clearance]\nground_m = -1\n", "non-negative"),
    ("[survey]\ndatetime = 'yesterday'\n", "ISO 8601"),
    ("[conductors.phase]\nbundle = 0\n", "bundle must be at least 1"),
])
def test_bad_line_files(tmp_path, text, fragment):
    p = write(tmp_path, text)
    with pytest.raises(InputError) as err:
        load_line_file(p)
    assert fragment in str(err.value)
    assert str(p) in str(err.value)


def test_missing_line_file(tmp_path):
    with pytest.raises(InputError, match="line file not found"):
        load_line_file(tmp_path / "nope.toml")


@pytest.mark.parametrize("text, fragment", [
    ("id,x\nA,1\nB,2\n", "lacks column"),
    ("id,x,y\nA,1,2\n", "at least two"),
    ("id,x,y\nA,1,2\nA,3,4\n", "not unique"),
    ("id,x,y\nA,1,b\nB,3,4\n", "must be numbers"),
    ("id,x,y,type\nA,1,2,gantry\nB,3,4,suspension\n", "is not suspension or deadend"),
])
def test_bad_structures(tmp_path, text, fragment):
    p = write(tmp_path, text, "s.csv")
    with pytest.raises(InputError, match=fragment):
        read_structures_csv(p)


def test_structure_type_optional(tmp_path):
    p = write(tmp_path, "id,x,y\nA,1,2\nB,3,4\n", "s.csv")
    assert [r["type"] for r in read_structures_csv(p)] == [None, None]

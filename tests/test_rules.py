"""Rulebook validation: every refusal names the file, line, key and what is allowed (common practice)."""

from __future__ import annotations

import math

import pytest

from landcheck.errors import RuleFileError
from landcheck.inputs.rulebook import load_rules, parse_rules

BASE = """[rulebook]
class_field = "zoning"

[classes.residential]
values = ["R"]
max_slope_pct = 18
"""


def test_valid_minimal():
    r = parse_rules(BASE, path="r.toml")
    c = r.classes[0]
    assert c.max_slope_pct == 18.0 and c.tolerance_share == 0.0 and c.development
    assert r.class_of_value() == {"R": "residential"}
    assert r.capability_limit_pct == 18.0


def test_degrees_converted_to_percent():
    # Source: docs/references.md §6 [C]: 15 degrees = 26.795 %; percent = 100 tan(angle).
    r = parse_rules(BASE.replace("max_slope_pct = 18", "max_slope_deg = 15"), path="r.toml")
    assert r.classes[0].max_slope_pct == pytest.approx(26.795, abs=1e-3)
    assert r.classes[0].max_slope_pct == pytest.approx(100 * math.tan(math.radians(15)))


@pytest.mark.parametrize(
    "text, pattern",
    [
        ("[rulebook\nclass_field = 1", r"r\.toml: not valid TOML"),
        (
            BASE + "colour = 'red'\n",
            r"r\.toml, line 7, \[classes\.residential\]\.colour: unknown key 'colour'; allowed keys",
        ),
        (
            BASE.replace("18", '"steep"'),
            r"line 6, \[classes\.residential\]\.max_slope_pct: got 'steep'; expected a number",
        ),
        (BASE.replace("18", "-5"), r"max_slope_pct: got -5; allowed range is \(0, 100\]"),
        (BASE.replace("18", "120"), r"max_slope_pct: got 120; allowed range"),
        (BASE + "tolerance_pct = 150\n", r"tolerance_pct: got 150; allowed range is \[0, 100\)"),
        (BASE + "tolerance_pct = -1\n", r"tolerance_pct: got -1"),
        (BASE + "review_band_pct = 20\n", r"review band must be smaller than the limit"),
        (BASE + 'forbidden_zones = ["floodway"]\n', r"zone 'floodway' is not defined"),
        (BASE.replace('class_field = "zoning"', ""), r"missing class_field"),
        ("[classes.a]\nvalues=['x']\n", r"missing the \[rulebook\] section"),
        (BASE + '\n[classes.other]\nvalues = ["R"]\n', r"value 'R' is already mapped to class 'residential'"),
        (BASE + '\n[zones.z]\nkind = "lava"\n', r"\[zones\.z\]\.kind: got 'lava'; choose one of"),
        (
            BASE + '\n[zones.z]\nkind = "easement"\nlayer = "shore"\nwidth_m = 3\n',
            r"layer 'shore' is not listed in \[layers\]",
        ),
        (BASE + '\n[zones.z]\nkind = "sea_rise"\nrise_m = 1\nscenarios_m = [2, 1]\n', r"not increasing"),
        (BASE + "\n[uncertainty]\nrmse_m = 0\n", r"rmse_m: got 0; allowed range is \(0"),
        (
            BASE + "\n[uncertainty]\nrmse_m = 2\nrealizations = 5\n",
            r"realizations: got 5; expected a whole number from 10 to 10000",
        ),
        (BASE + 'designated_class = "forest"\n', r"class 'forest' is not defined"),
    ],
)
def test_refusals(text, pattern):
    with pytest.raises(RuleFileError, match=pattern):
        parse_rules(text, path="r.toml")


def test_context_needed_for_per_context_widths(tmp_path):
    text = (
        BASE
        + 'forbidden_zones = ["strip"]\n[layers]\nshore = "s.gpkg"\n[zones.strip]\nkind = "easement"\nlayer = "shore"\nwidth_m = { urban = 3.0 }\n'
    )
    with pytest.raises(RuleFileError, match="needs context"):
        parse_rules(text, path="r.toml")


def test_missing_file_and_layer_paths_relative(tmp_path):
    with pytest.raises(RuleFileError, match="rulebook file not found"):
        load_rules(tmp_path / "none.toml")
    p = tmp_path / "sub" / "r.toml"
    p.parent.mkdir()
    p.write_text(BASE + '[layers]\nshore = "shore.gpkg"\n')
    r = load_rules(p)
    assert r.layers["shore"] == str(tmp_path / "sub" / "shore.gpkg")
    assert len(r.sha256) == 64

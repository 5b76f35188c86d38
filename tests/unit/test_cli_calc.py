"""`gasgap calc` as a user runs it: a subprocess, its output and its exit code."""

from __future__ import annotations

import json
import subprocess
import sys

import pytest

KEYS = {
    "barometric_pressure",
    "water_vapour_pressure",
    "inspired_po2",
    "alveolar_po2",
    "aa_gradient",
    "aa_gradient_expected",
    "arterial_alveolar_ratio",
    "pf_ratio",
    "pf_ratio_adjusted",
    "berlin_band",
    "sf_ratio",
    "oxygenation_index",
    "oxygen_saturation_index",
    "pao2_imputed_from_spo2",
    "arterial_o2_content",
    "units",
    "equation",
    "flags",
    "advisory",
}  # issue 2, "gasgap calc": exactly these keys


def gasgap(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [sys.executable, "-m", "monitor.cli", *args], capture_output=True, text=True, timeout=60
    )


def calc_json(*args: str) -> dict[str, object]:
    done = gasgap("calc", *args, "--json")
    assert done.returncode == 0, done.stderr
    return json.loads(done.stdout)


def test_room_air_example_prints_exactly_the_documented_keys() -> None:
    out = calc_json("--pao2", "85", "--paco2", "40", "--fio2", "0.21")
    assert set(out) == KEYS
    # Sheet s.1: PAO2 full form 101.83 at PH2O 47; at 37 C PH2O is 47.12 (s.2), which
    # lowers PIO2 by 0.21 x 0.12 = 0.025 mmHg.
    assert out["alveolar_po2"] == pytest.approx(101.83 - 0.025, abs=0.005)
    assert out["aa_gradient"] == pytest.approx(101.83 - 0.025 - 85, abs=0.005)
    assert out["pf_ratio"] == pytest.approx(85 / 0.21)
    assert out["water_vapour_pressure"] == pytest.approx(47.12, abs=0.005)
    # Missing inputs give null, never a made-up number.
    for key in (
        "sf_ratio",
        "oxygenation_index",
        "arterial_o2_content",
        "berlin_band",
        "aa_gradient_expected",
        "pao2_imputed_from_spo2",
    ):
        assert out[key] is None, key
    assert out["units"] == "mmHg" and out["equation"] == "full"
    assert "clinicians decide" in str(out["advisory"])


def test_sf_is_null_above_97_percent_and_given_at_94() -> None:
    # Rice 2007 (sheet s.6): S/F only for SpO2 <= 97 %; 94 / 0.40 = 235.
    assert calc_json("--fio2", "0.4", "--spo2", "98")["sf_ratio"] is None
    assert calc_json("--fio2", "0.4", "--spo2", "94")["sf_ratio"] == pytest.approx(235.0)


def test_altitude_case_gives_adjusted_ratio_and_band() -> None:
    # Sheet s.3 and s.5: 1600 m -> PB 626.51; P/F 150 -> 182.0 adjusted; with PEEP 8 that
    # is the moderate band (the literal printed footnote would say 123.7, see S1).
    out = calc_json(
        "--pao2", "60", "--paco2", "35", "--fio2", "0.4", "--elevation-m", "1600", "--peep", "8"
    )
    assert out["barometric_pressure"] == pytest.approx(626.51, abs=0.01)
    assert out["pf_ratio"] == pytest.approx(150.0)
    assert out["pf_ratio_adjusted"] == pytest.approx(182.0, abs=0.05)
    assert out["berlin_band"] == "moderate"


def test_fio2_given_as_percent_is_read_as_a_fraction_with_a_note() -> None:
    out = calc_json("--pao2", "150", "--paco2", "40", "--fio2", "50")
    assert out["pf_ratio"] == pytest.approx(300.0)  # sheet s.5: 150/0.5 = 300
    assert any("percentage" in str(f) for f in out["flags"])  # type: ignore[union-attr]


def test_age_expected_gradient_on_room_air_only() -> None:
    # StatPearls (age + 10)/4 (sheet s.4): 12.5 at 40 years.
    assert calc_json("--pao2", "85", "--paco2", "40", "--fio2", "0.21", "--age", "40")[
        "aa_gradient_expected"
    ] == pytest.approx(12.5)
    assert (
        calc_json("--pao2", "85", "--paco2", "40", "--fio2", "0.3", "--age", "40")[
            "aa_gradient_expected"
        ]
        is None
    )


def test_kpa_units_in_and_out() -> None:
    # Sheet s.1: PB 101.325 kPa, PaCO2 5.3 kPa, simplified, with PH2O 6.3 kPa -> 13.33 kPa;
    # here PH2O is 6.28 kPa at 37 C (s.2), so PAO2 is 0.21 x 0.02 kPa higher.
    out = calc_json(
        "--pao2",
        "12",
        "--paco2",
        "5.3",
        "--fio2",
        "0.21",
        "--pb",
        "101.325",
        "--units",
        "kPa",
        "--equation",
        "simplified",
    )
    assert out["units"] == "kPa"
    assert out["alveolar_po2"] == pytest.approx(13.33 + 0.21 * 0.018, abs=0.006)
    assert out["barometric_pressure"] == pytest.approx(101.325)
    # P/F in kPa: 12 / 0.21
    assert out["pf_ratio"] == pytest.approx(12 / 0.21)


def test_simplified_equation_matches_reference_table() -> None:
    # Sheet s.1: FiO2 0.5, PaCO2 40 -> simplified 306.50 at PH2O 47 (here 47.12: -0.06).
    out = calc_json("--pao2", "150", "--paco2", "40", "--fio2", "0.5", "--equation", "simplified")
    assert out["alveolar_po2"] == pytest.approx(306.50 - 0.06, abs=0.005)


def test_table_output_shows_formulas_and_the_caution() -> None:
    done = gasgap("calc", "--pao2", "85", "--paco2", "40", "--fio2", "0.21")
    assert done.returncode == 0
    assert "PIO2 - PaCO2 x [FiO2 + (1 - FiO2)/R]" in done.stdout
    assert "clinicians decide" in done.stdout


@pytest.mark.parametrize(
    ("args", "option", "problem"),
    [
        (["--pao2", "abc"], "--pao2", "not a number"),
        (["--pao2", "85", "--paco2", "40", "--fio2", "1.4"], "--fio2", "not 1.4"),
        (["--pao2", "85", "--paco2", "40", "--fio2", "0.1"], "--fio2", "[0.209, 1.0]"),
        (["--pao2", "85", "--paco2", "40", "--fio2", "0.2089"], "--fio2", "not 0.2089"),
        # issue 12 point 9: the value as typed, never the converted "1.5"
        (["--pao2", "85", "--paco2", "40", "--fio2", "150"], "--fio2", "not 150.0"),
        (
            ["--pao2", "85", "--paco2", "40", "--fio2", "0.3", "--peep", "-1"],
            "--peep",
            "[0, 40] cmH2O",
        ),
        # PaCO2 140 on room air leaves no alveolar O2 (sheet s.1 formula: 149.7 - 167.6)
        (["--pao2", "40", "--paco2", "140", "--fio2", "0.21"], "--paco2", "not 140.0"),
        # ISA at 9000 m is 231 mmHg, below the 250 mmHg guard (sheet s.3 formula)
        (
            ["--pao2", "85", "--paco2", "40", "--fio2", "0.3", "--elevation-m", "9000"],
            "--elevation-m",
            "not 9000.0",
        ),
        (["--pao2", "85", "--paco2", "720", "--fio2", "0.3"], "--paco2", "below PB - PH2O"),
        (
            ["--pao2", "85", "--paco2", "40", "--fio2", "0.3", "--temp-c", "50"],
            "--temp-c",
            "[25, 45]",
        ),
        (
            ["--pao2", "85", "--paco2", "40", "--fio2", "0.3", "--elevation-m", "20000"],
            "--elevation-m",
            "[-500, 11000]",
        ),
        (["--pao2", "85", "--fio2", "0.3", "--units", "psi"], "--units", "invalid choice"),
    ],
)
def test_bad_input_gets_one_line_naming_the_option_and_exit_2(
    args: list[str], option: str, problem: str
) -> None:
    done = gasgap("calc", *args)
    assert done.returncode == 2
    assert "Traceback" not in done.stderr
    lines = done.stderr.strip().splitlines()
    assert len(lines) == 1, done.stderr
    assert option in lines[0] and problem in lines[0]


def test_messages_blame_the_option_typed_not_a_computed_value() -> None:
    # Issue 12 point 9: no computed alveolar value shown as the user's --paco2, and a
    # too-high elevation is not blamed on --pb.
    paco2 = gasgap("calc", "--pao2", "40", "--paco2", "140", "--fio2", "0.21").stderr
    assert "leaves no alveolar oxygen" in paco2 and "not -17.9" not in paco2
    elevation = gasgap(
        "calc", "--pao2", "85", "--paco2", "40", "--fio2", "0.3", "--elevation-m", "9000"
    ).stderr
    assert "--pb" not in elevation and "231 mmHg" in elevation
    assert "not 1.5" not in gasgap("calc", "--pao2", "85", "--fio2", "150").stderr


@pytest.mark.parametrize("fio2", ["0.209", "20.9"])
def test_room_air_written_as_20_9_percent_is_accepted(fio2: str) -> None:
    # 20.9 % is dry air's 20.95 % O2 rounded (from memory); sheet s.1 uses 0.2093.
    out = calc_json("--pao2", "85", "--paco2", "40", "--fio2", fio2, "--age", "40")
    assert out["pf_ratio"] == pytest.approx(85 / 0.209)
    assert out["aa_gradient_expected"] == pytest.approx(12.5)  # (40 + 10)/4, StatPearls


@pytest.mark.parametrize(
    ("pao2", "paco2", "warned"),
    [
        ("12", "5.3", {"PaO2", "PaCO2"}),  # a normal gas in kPa, typed as mmHg
        ("19.9", "40", {"PaO2"}),
        ("20", "10", set()),  # the limits themselves: common practice, no source
        ("85", "40", set()),
    ],
)
def test_kpa_typed_as_mmhg_gets_a_plausibility_warning(
    pao2: str, paco2: str, warned: set[str]
) -> None:
    flags = calc_json("--pao2", pao2, "--paco2", paco2, "--fio2", "0.21")["flags"]
    hits = {
        name for name in ("PaO2", "PaCO2") for f in flags if f.startswith(f"{name} ") and "kPa" in f
    }  # type: ignore[union-attr]
    assert hits == warned


def test_a_child_gets_a_note_that_the_age_normal_is_an_adult_formula() -> None:
    out = calc_json("--pao2", "90", "--paco2", "40", "--fio2", "0.21", "--age", "5")
    assert out["aa_gradient_expected"] == pytest.approx(3.75)  # (5 + 10)/4, StatPearls
    assert any("adult formula" in f for f in out["flags"])  # type: ignore[union-attr]
    adult = calc_json("--pao2", "90", "--paco2", "40", "--fio2", "0.21", "--age", "18")
    assert not any("adult formula" in f for f in adult["flags"])  # type: ignore[union-attr]


@pytest.mark.parametrize(
    ("elevation", "adjusted"), [("600", False), ("1000", False), ("1600", True)]
)
def test_calc_adjusts_pf_as_the_service_does(elevation: str, adjusted: bool) -> None:
    # Issue 12 point 5: Berlin adjusts above 1000 m (ISA 674.13 mmHg at 1000 m, sheet s.3).
    out = calc_json(
        "--pao2", "95", "--paco2", "40", "--fio2", "0.5", "--peep", "8", "--elevation-m", elevation
    )
    assert (out["pf_ratio_adjusted"] is not None) is adjusted
    assert out["berlin_band"] == ("mild" if adjusted else "moderate")  # 190 -> 230.5 at 1600

"""``gasgap calc``: the oxygenation indices of one blood gas, typed in by hand.

Only argument parsing and printing: ``monitor.calc`` does the work.
"""

from __future__ import annotations

import argparse
import json

from monitor import calc
from monitor.cli.common import Subparsers, UsageError
from monitor.engine import physiology as phys
from monitor.engine.errors import InvalidInput
from monitor.engine.model import ADVISORY


def _number(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number") from None
    if value != value or value in (float("inf"), float("-inf")):
        raise argparse.ArgumentTypeError(f"{text!r} is not a finite number")
    return value


# --- calc ----------------------------------------------------------------------------

_OPTION_FOR_INPUT = {
    "pao2": "--pao2",
    "paco2": "--paco2",
    "fio2": "--fio2",
    "barometric pressure": "--pb",
    "elevation": "--elevation-m",
    "temperature": "--temp-c",
    "respiratory quotient": "--rq",
    "age": "--age",
    "spo2": "--spo2",
    "saturation": "--spo2",
    "mean airway pressure": "--map",
    "haemoglobin": "--hb",
    "sao2": "--sao2",
    "water vapour pressure": "--temp-c",
    "alveolar po2": "--paco2",
    "peep": "--peep",
}


def add_calc_command(sub: Subparsers) -> None:
    p = sub.add_parser(
        "calc",
        help="compute the oxygenation indices of one blood gas by hand",
        description="Compute alveolar PO2, the A-a gradient and related indices of one "
        "blood gas. " + ADVISORY,
    )
    p.add_argument("--pao2", type=_number, help="arterial PO2 (mmHg, or kPa)")
    p.add_argument("--paco2", type=_number, help="arterial PCO2 (mmHg, or kPa)")
    p.add_argument(
        "--fio2", type=_number, help="inspired O2 fraction (0.209-1; above 1 read as %%)"
    )
    where = p.add_mutually_exclusive_group()
    where.add_argument("--pb", type=_number, help="barometric pressure (default 760 mmHg)")
    where.add_argument("--elevation-m", type=_number, help="site elevation; PB from ISA")
    p.add_argument("--temp-c", type=_number, default=37.0, help="body temperature, C")
    p.add_argument("--rq", type=_number, default=0.8, help="respiratory quotient (0.8)")
    p.add_argument("--age", type=_number, help="age in years (age-expected A-a)")
    p.add_argument("--spo2", type=_number, help="pulse oximetry SpO2, %%")
    p.add_argument("--peep", type=_number, help="PEEP or CPAP, cmH2O")
    p.add_argument("--map", type=_number, help="mean airway pressure, cmH2O")
    p.add_argument("--hb", type=_number, help="haemoglobin, g/dL")
    p.add_argument("--sao2", type=_number, help="measured SaO2, %%")
    p.add_argument("--units", choices=["mmHg", "kPa"], default="mmHg", help="inputs and outputs")
    p.add_argument(
        "--equation",
        choices=[e.value for e in phys.Equation],
        default="full",
        help="alveolar gas equation form (full)",
    )
    p.add_argument("--json", action="store_true", help="print one JSON object")
    p.set_defaults(run=_run_calc)


def _calc_input(args: argparse.Namespace) -> tuple[calc.GasInput, list[str]]:
    notes: list[str] = []
    to_mmhg = phys.kpa_to_mmhg if args.units == "kPa" else (lambda x: x)

    def pressure(value: float | None) -> float | None:
        return None if value is None else to_mmhg(value)

    fio2 = args.fio2
    if fio2 is not None:
        fio2, note = calc.read_fio2(fio2)  # errors name the value as typed
        notes.extend([note] if note else [])
    sao2 = args.sao2
    gas = calc.GasInput(
        pao2=pressure(args.pao2),
        paco2=pressure(args.paco2),
        fio2=fio2,
        barometric_pressure=pressure(args.pb),
        elevation_m=args.elevation_m,
        temperature_c=args.temp_c,
        rq=args.rq,
        age_years=args.age,
        spo2=args.spo2,
        peep=args.peep,
        mean_airway_pressure=args.map,
        haemoglobin=args.hb,
        sao2=sao2,
        equation=phys.Equation(args.equation),
    )
    if gas.paco2 is not None and gas.pao2 is None and gas.fio2 is None:
        raise UsageError("--fio2: needed with --paco2 to compute alveolar PO2")
    return gas, notes


def _run_calc(args: argparse.Namespace) -> int:
    try:
        gas, notes = _calc_input(args)
        result = calc.calculate(gas)
        values = calc.in_units(result, args.units)
    except InvalidInput as exc:
        option = _OPTION_FOR_INPUT.get(exc.name, exc.name)
        raise UsageError(f"{option}: {exc.rule}, not {exc.value!r}") from None
    flags = notes + result.flags
    if args.json:
        out: dict[str, object] = dict(values)
        out.update(
            units=args.units,
            equation=gas.equation.value,
            flags=flags,
            advisory=ADVISORY,
        )
        print(json.dumps(out, indent=2))
        return 0
    print(_calc_table(values, result.formulas, args.units, gas))
    for flag in flags:
        print(f"note: {flag}")
    print()
    print(ADVISORY)
    return 0


_LABELS = {
    "barometric_pressure": ("Barometric pressure (PB)", "p"),
    "water_vapour_pressure": ("Water vapour (PH2O)", "p"),
    "inspired_po2": ("Inspired PO2 (PIO2)", "p"),
    "alveolar_po2": ("Alveolar PO2 (PAO2)", "p"),
    "aa_gradient": ("A-a gradient", "p"),
    "aa_gradient_expected": ("A-a expected for age", "p"),
    "arterial_alveolar_ratio": ("a/A ratio", "r2"),
    "pf_ratio": ("P/F ratio", "pf"),
    "pf_ratio_adjusted": ("P/F adjusted to sea level", "pf"),
    "berlin_band": ("Berlin band", "s"),
    "sf_ratio": ("S/F ratio", "r0"),
    "oxygenation_index": ("Oxygenation index", "r1"),
    "oxygen_saturation_index": ("O2 saturation index", "r1"),
    "pao2_imputed_from_spo2": ("PaO2 from SpO2 (est.)", "p"),
    "arterial_o2_content": ("CaO2 (mL/dL)", "r1"),
}


def _calc_table(
    values: dict[str, float | str | None], formulas: dict[str, str], units: str, gas: calc.GasInput
) -> str:
    rows = [f"{'':26}{'value':>10}  formula"]
    for key in calc.KEYS:
        label, style = _LABELS[key]
        value = values[key]
        if value is None:
            shown = "-"
        elif isinstance(value, str):
            shown = value
        elif style == "p":
            shown = f"{value:.1f} {units}"
        elif style == "pf":
            shown = f"{value:.0f}" if units == "mmHg" else f"{value:.1f}"
        elif style == "r2":
            shown = f"{value:.2f}"
        elif style == "r0":
            shown = f"{value:.0f}"
        else:
            shown = f"{value:.1f}"
        rows.append(f"{label:26}{shown:>10}  {formulas.get(key, '')}")
    rows.append(f"{'Equation':26}{gas.equation.value:>10}  R = {gas.rq:g}")
    return "\n".join(rows)

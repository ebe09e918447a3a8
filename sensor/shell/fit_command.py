"""``sigmatrack fit solubility`` and ``sigmatrack fit msz``: fit lab data, print the result.

Both print a short table for people, or one JSON object with ``--json``. Bad data give one line
naming the file, the line and the problem, and exit status 2.
"""

from __future__ import annotations

import argparse
import json
from dataclasses import dataclass
from typing import Any

import numpy as np

from sensor.errors import DataFileError, FitError, UnitError
from sensor.metastable import NyvltFit, fit_nyvlt
from sensor.shell.labdata import SolubilityData, read_cloud_points_csv, read_solubility_csv
from sensor.shell.tables import format_table
from sensor.solubility import (
    FITTED_MODEL_NAMES,
    CompositionBasis,
    ModelChoice,
    SolubilityFit,
    auto_candidates,
    choose_solubility_model,
    fit_solubility,
    fittable_model,
)
from sensor.units import (
    ZERO_CELSIUS_K,
    ConcentrationUnit,
    celsius_to_kelvin,
    concentration_unit,
    per_minute_to_per_second,
)

CLI_CONC_UNITS = ("kg/kg", "g/100g", "mass-fraction", "mole-fraction")


def _floats(text: str) -> list[float]:
    try:
        values = [float(part) for part in text.split(",") if part.strip()]
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"expected numbers separated by commas; got {text!r}"
        ) from None
    if not values or not all(np.isfinite(values)):
        raise argparse.ArgumentTypeError(
            f"expected finite numbers separated by commas; got {text!r}"
        )
    return values


def _molar_masses(text: str) -> tuple[float, float]:
    values = _floats(text)
    if len(values) != 2 or min(values) <= 0:
        raise argparse.ArgumentTypeError(
            "expected two positive molar masses: SOLUTE,SOLVENT (g/mol)"
        )
    return values[0], values[1]


def _add_solubility_options(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--model",
        choices=("auto", *FITTED_MODEL_NAMES),
        default="auto",
        help="correlation to fit; auto picks the lowest AICc (default: auto)",
    )
    parser.add_argument(
        "--conc-unit",
        choices=CLI_CONC_UNITS,
        default="kg/kg",
        help="unit of the conc columns (default: kg/kg solvent)",
    )
    parser.add_argument(
        "--molar-masses",
        type=_molar_masses,
        metavar="SOLUTE,SOLVENT",
        help="molar masses in g/mol: fit in mole fraction (else in mass fraction)",
    )
    parser.add_argument(
        "--melting-temp-c",
        type=float,
        metavar="T",
        help="melting point of the solute in °C (lets lambda-h be fitted)",
    )
    parser.add_argument(
        "--degree",
        type=int,
        default=2,
        choices=range(1, 6),
        metavar="N",
        help="degree of the polynomial correlation, 1 to 5 (default: 2)",
    )
    parser.add_argument(
        "--margin-k",
        type=float,
        default=5.0,
        metavar="K",
        help="how far beyond the data the curve is trusted, in K (default: 5)",
    )
    parser.add_argument("--json", action="store_true", help="print one JSON object")


def register(commands: argparse._SubParsersAction) -> None:
    """Add ``fit solubility`` and ``fit msz``."""
    fit = commands.add_parser(
        "fit",
        help="fit solubility curves and the metastable zone to lab data",
        description="Fit solubility curves and the metastable-zone limit to lab data.",
    )
    targets = fit.add_subparsers(dest="target", required=True, metavar="WHAT")

    solubility = targets.add_parser(
        "solubility",
        help="fit a solubility curve to (temp_c, conc) points",
        description=(
            "Fit a solubility curve to a CSV with columns temp_c and conc (other columns are "
            "ignored, lines starting with # are comments). Prints the candidates, the chosen "
            "correlation's parameters and, with --at, the curve with its 95%% confidence band."
        ),
    )
    solubility.add_argument("data", metavar="DATA.csv", help="solubility points")
    _add_solubility_options(solubility)
    solubility.add_argument(
        "--at",
        type=_floats,
        metavar="T1,T2,...",
        help="temperatures in °C at which to print the curve with its 95%% band",
    )
    solubility.set_defaults(run=run_fit_solubility)

    msz = targets.add_parser(
        "msz",
        help="fit Nývlt's metastable-zone relation to cloud points",
        description=(
            "Fit Nývlt's relation between maximum undercooling and cooling rate to a CSV with "
            "columns conc, rate_k_per_min and cloud_temp_c, against the solubility curve fitted "
            "to --solubility. Prints the parameters and the zone width at the rates given."
        ),
    )
    msz.add_argument("data", metavar="CLOUDPOINTS.csv", help="polythermal cloud points")
    msz.add_argument("--solubility", required=True, metavar="DATA.csv", help="solubility points")
    _add_solubility_options(msz)
    msz.add_argument(
        "--rates",
        type=_floats,
        metavar="R1,R2,...",
        help="cooling rates in K/min for the width table (default: those in the data)",
    )
    msz.add_argument(
        "--temps",
        type=_floats,
        metavar="T1,T2,...",
        help="saturation temperatures in °C for the width table (default: those of the data)",
    )
    msz.set_defaults(run=run_fit_msz)


@dataclass(frozen=True)
class _Setup:
    unit: ConcentrationUnit
    basis: CompositionBasis
    melt_temp_k: float | None


def _setup(args: argparse.Namespace) -> _Setup:
    masses = args.molar_masses
    try:
        unit = concentration_unit(
            args.conc_unit,
            solute_molar_mass=None if masses is None else masses[0] / 1000.0,
            solvent_molar_mass=None if masses is None else masses[1] / 1000.0,
        )
    except UnitError as error:
        raise UnitError(f"--conc-unit {args.conc_unit}: {error} (give --molar-masses)") from None
    basis = (
        CompositionBasis.mass_fraction()
        if masses is None
        else CompositionBasis.mole_fraction(masses[0] / 1000.0, masses[1] / 1000.0)
    )
    melt = None if args.melting_temp_c is None else args.melting_temp_c + ZERO_CELSIUS_K
    return _Setup(unit, basis, melt)


def _fit(data: SolubilityData, args: argparse.Namespace, setup: _Setup) -> ModelChoice:
    try:
        if args.model == "auto":
            candidates = auto_candidates(
                melt_temp_k=setup.melt_temp_k, polynomial_degree=args.degree
            )
            choice = choose_solubility_model(
                data.temp_k,
                data.conc,
                candidates,
                setup.basis,
                extrapolation_margin_k=args.margin_k,
            )
            if setup.melt_temp_k is None:
                choice.skipped["lambda-h"] = "needs the solute's melting point (--melting-temp-c)"
            return choice
        model = fittable_model(
            args.model, melt_temp_k=setup.melt_temp_k, polynomial_degree=args.degree
        )
        fit = fit_solubility(
            data.temp_k, data.conc, model, setup.basis, extrapolation_margin_k=args.margin_k
        )
        return ModelChoice(best=fit, fits=(fit,))
    except FitError as error:
        line = None if error.point is None else data.source.line_of(error.point)
        raise DataFileError(data.source.file, line, str(error)) from None


def _rmse_in_unit(fit: SolubilityFit, unit: ConcentrationUnit) -> float:
    predicted = unit.from_kg_per_kg(fit.predicted, fit.temp_k)
    observed = unit.from_kg_per_kg(fit.conc, fit.temp_k)
    return float(np.sqrt(np.mean((predicted - observed) ** 2)))


def _solubility_summary(choice: ModelChoice, unit: ConcentrationUnit) -> dict[str, Any]:
    best = choice.best
    curve = best.curve
    names = curve.model.param_names
    std = np.sqrt(np.diag(curve.covariance))
    lo, hi = curve.temp_range_k
    return {
        "model": curve.model.name,
        "basis": curve.basis.name,
        "params": dict(zip(names, curve.params.tolist(), strict=True)),
        "param_std": dict(zip(names, std.tolist(), strict=True)),
        "covariance": curve.covariance.tolist(),
        "rmse": _rmse_in_unit(best, unit),
        "rmse_relative": best.rmse_relative,
        "aicc": best.aicc,
        "n_points": best.n_points,
        "temp_range_c": [lo - ZERO_CELSIUS_K, hi - ZERO_CELSIUS_K],
        "conc_unit": unit.name,
        "candidates": [
            {"model": f.curve.model.name, "aicc": f.aicc, "rmse": _rmse_in_unit(f, unit)}
            for f in choice.fits
        ],
        "skipped": dict(choice.skipped),
    }


def _curve_at(
    choice: ModelChoice, unit: ConcentrationUnit, temps_c: list[float]
) -> list[dict[str, Any]]:
    curve = choice.best.curve
    temp_k = celsius_to_kelvin(temps_c)
    lo, hi = curve.interval(temp_k)
    rows = []
    for i, t in enumerate(temps_c):
        values = [curve.c_sat(temp_k[i]), lo[i], hi[i]]
        try:
            conc, low, high = (float(unit.from_kg_per_kg(v, temp_k[i])) for v in values)
        except UnitError as error:
            raise FitError(
                f"--at {t:g}: the curve gives no concentration there ({error})"
            ) from None
        rows.append(
            {
                "temp_c": t,
                "conc": conc,
                "lo": low,
                "hi": high,
                "extrapolated": bool(curve.extrapolated(temp_k[i])),
            }
        )
    return rows


def _print_solubility(summary: dict[str, Any], source: str) -> None:
    unit = summary["conc_unit"]
    lo, hi = summary["temp_range_c"]
    print(f"Solubility fit of {source}")
    print(
        f"  {summary['n_points']} points, {lo:.1f} to {hi:.1f} °C, conc in {unit}, "
        f"correlations in {summary['basis']}"
    )
    print()
    best_aicc = summary["candidates"][0]["aicc"]
    rows = [
        [
            c["model"] + (" (chosen)" if c["model"] == summary["model"] else ""),
            f"{c['aicc']:.2f}",
            f"{c['aicc'] - best_aicc:.2f}",
            f"{c['rmse']:.4g}",
        ]
        for c in summary["candidates"]
    ]
    print(format_table(["model", "AICc", "dAICc", f"RMSE [{unit}]"], rows))
    for model, why in summary["skipped"].items():
        print(f"  not fitted: {model}: {why}")
    print()
    print(f"Parameters of {summary['model']} (T in K), with standard deviations:")
    rows = [
        [name, f"{value:.6g}", f"{summary['param_std'][name]:.3g}"]
        for name, value in summary["params"].items()
    ]
    print(format_table(["name", "value", "std"], rows))
    print(f"  RMSE {summary['rmse']:.4g} {unit} ({100 * summary['rmse_relative']:.2f} %)")
    if "at" in summary:
        print()
        print(f"Solubility [{unit}] with its 95 % confidence band:")
        rows = [
            [
                f"{r['temp_c']:g}",
                f"{r['conc']:.5g}",
                f"{r['lo']:.5g}",
                f"{r['hi']:.5g}",
                "extrapolated" if r["extrapolated"] else "",
            ]
            for r in summary["at"]
        ]
        print(format_table(["temp_c", "conc", "lo", "hi", ""], rows))


def run_fit_solubility(args: argparse.Namespace) -> int:
    setup = _setup(args)
    data = read_solubility_csv(args.data, setup.unit)
    choice = _fit(data, args, setup)
    summary = _solubility_summary(choice, setup.unit)
    if args.at:
        summary["at"] = _curve_at(choice, setup.unit, args.at)
    if args.json:
        print(json.dumps(summary, indent=2))
    else:
        _print_solubility(summary, args.data)
    return 0


def _msz_summary(
    fit: NyvltFit, rates_k_per_min: list[float], temps_c: list[float]
) -> dict[str, Any]:
    zone = fit.zone
    derived_std = np.sqrt(np.diag(zone.derived_covariance()))
    raw_std = np.sqrt(np.diag(zone.covariance))
    widths = []
    for temp_c in temps_c:
        for rate in rates_k_per_min:
            temp_k = temp_c + ZERO_CELSIUS_K
            rate_s = float(per_minute_to_per_second(rate))
            lo, hi = zone.width_interval_k(temp_k, rate_s)
            widths.append(
                {
                    "temp_sat_c": temp_c,
                    "rate_k_per_min": rate,
                    "width_k": float(zone.width_k(temp_k, rate_s)),
                    "lo": float(lo),
                    "hi": float(hi),
                    "extrapolated": bool(
                        zone.rate_extrapolated(rate_s) or zone.solubility.extrapolated(temp_k)
                    ),
                }
            )
    rate_lo, rate_hi = zone.rate_range_k_per_s
    return {
        "method": "nyvlt",
        "params": {
            "m": zone.order_m,
            "ln_k_n": zone.ln_k_n,
            "a0": float(zone.params[0]),
            "a1": float(zone.params[1]),
        },
        "param_std": {
            "m": float(derived_std[0]),
            "ln_k_n": float(derived_std[1]),
            "a0": float(raw_std[0]),
            "a1": float(raw_std[1]),
        },
        "units": "rate in K/s, concentration in kg/kg solvent, temperature in K",
        "rmse_k": fit.rmse_k,
        "aicc": fit.aicc,
        "n_points": len(fit.width_k),
        "rate_range_k_per_min": [rate_lo * 60.0, rate_hi * 60.0],
        "widths": widths,
    }


def _print_msz(summary: dict[str, Any], solubility: dict[str, Any], source: str) -> None:
    params, std = summary["params"], summary["param_std"]
    lo, hi = summary["rate_range_k_per_min"]
    print(f"Metastable zone (Nývlt) from {source}")
    print(
        f"  {summary['n_points']} cloud points, {lo:g} to {hi:g} K/min; solubility: "
        f"{solubility['model']} (RMSE {solubility['rmse']:.3g} {solubility['conc_unit']})"
    )
    print(f"  apparent nucleation order m  {params['m']:.4g} ± {std['m']:.2g}")
    print(f"  ln K_N (SI units)            {params['ln_k_n']:.4g} ± {std['ln_k_n']:.2g}")
    print(f"  RMSE of the zone width       {summary['rmse_k']:.3g} K")
    print()
    print("Zone width [K] with its 95 % band, by saturation temperature and cooling rate:")
    rows = [
        [
            f"{w['temp_sat_c']:.1f}",
            f"{w['rate_k_per_min']:g}",
            f"{w['width_k']:.2f}",
            f"{w['lo']:.2f}",
            f"{w['hi']:.2f}",
            "extrapolated" if w["extrapolated"] else "",
        ]
        for w in summary["widths"]
    ]
    print(format_table(["temp_sat_c", "rate_k_per_min", "width_k", "lo", "hi", ""], rows))


def run_fit_msz(args: argparse.Namespace) -> int:
    setup = _setup(args)
    solubility_data = read_solubility_csv(args.solubility, setup.unit)
    choice = _fit(solubility_data, args, setup)
    points = read_cloud_points_csv(args.data, setup.unit)
    try:
        fit = fit_nyvlt(points.conc, points.rate_k_per_s, points.cloud_temp_k, choice.best.curve)
    except FitError as error:
        line = None if error.point is None else points.source.line_of(error.point)
        raise DataFileError(args.data, line, str(error)) from None
    rates = args.rates or sorted({round(r * 60.0, 6) for r in points.rate_k_per_s})
    temps = args.temps or sorted({round(t - ZERO_CELSIUS_K, 1) for t in fit.temp_sat_k})
    summary = _msz_summary(fit, rates, temps)
    solubility = _solubility_summary(choice, setup.unit)
    summary["solubility"] = {
        k: solubility[k] for k in ("model", "basis", "params", "rmse", "conc_unit")
    }
    if args.json:
        print(json.dumps(summary, indent=2))
    else:
        _print_msz(summary, solubility, args.data)
    return 0

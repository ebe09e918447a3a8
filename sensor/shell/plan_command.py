"""``sigmatrack plan``: an offline minimum-time cooling profile on the soft sensor's model.

The profile starts at seeding: a clear solution saturated at ``--saturation-c``, at the seed
temperature ``--start-c``, with the unit's seed charge just added (the model's prior at that
point: the filter's initial uncertainty and the seed's). It ends at the guard's final
temperature (or ``--final-c``) and keeps the forecast sigma (plus ``--confidence-k``
standard deviations, 0 by default) under ``--sigma-max`` (default:
``controller.target_fraction_of_zone`` of the metastable limit at the seed temperature and
``controller.target_zone_rate_k_per_min``), no faster than ``guard.max_cooling_rate_k_per_min``
(:func:`controller.optimal_profile.minimum_time_profile`). It is written as a profile CSV
(DEVELOPERS.md, "Profile CSV"), which the simulator's recipe can follow
(``simulator.recipe.cooling_profile = "file"`` with ``cooling_profile_file``).
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import numpy as np

from controller.errors import ControllerError
from controller.optimal_profile import PlanSettings, minimum_time_profile
from sensor.crystallizer import ZETA0, ZETA3
from sensor.errors import SigmatrackError
from sensor.kalman import initial_state, initial_vector, seed_covariance
from sensor.predictor import SigmaPredictor
from sensor.shell.config import load_site_file
from sensor.shell.labdata import write_profile_csv
from sensor.shell.replay_command import ADVISORY, EXIT_FAILED
from sensor.shell.sitesensor import pipeline_setup, site_zone
from sensor.units import ZERO_CELSIUS_K, per_minute_to_per_second


class PlanCommandError(SigmatrackError, ValueError):
    """The plan cannot be made from these settings (the controller's reason, as a person
    reads it)."""


def register(commands: argparse._SubParsersAction) -> None:
    """Add ``plan``."""
    parser = commands.add_parser(
        "plan",
        help="an offline minimum-time cooling profile under a sigma cap (profile CSV)",
        description=(
            "Plan the shortest cooling profile from seeding to the final temperature whose "
            "forecast supersaturation (plus confidence_k standard deviations) stays under a "
            "cap, on the site's model. A plan on a model: review it before loading it into a "
            "recipe. " + ADVISORY
        ),
    )
    parser.add_argument("--config", required=True, metavar="FILE", help="the site file (TOML)")
    parser.add_argument(
        "--out", metavar="profile.csv", help="write the profile here (default: stdout)"
    )
    parser.add_argument("--unit", metavar="ID", help="the unit (default: the site's first)")
    parser.add_argument(
        "--start-c", type=float, required=True, metavar="TEMP", help="seed temperature [°C]"
    )
    parser.add_argument(
        "--saturation-c",
        type=float,
        required=True,
        metavar="TEMP",
        help="the charge's saturation temperature [°C] (its concentration, read on the curve)",
    )
    parser.add_argument(
        "--final-c", type=float, metavar="TEMP", help="final temperature [°C] (default: guard's)"
    )
    parser.add_argument(
        "--sigma-max",
        type=float,
        metavar="SIGMA",
        help="the cap on sigma [-] (default: the target fraction of the zone at the start)",
    )
    parser.add_argument(
        "--confidence-k",
        type=float,
        default=0.0,
        metavar="K",
        help=(
            "standard deviations of the forecast kept under the cap (default 0: the model's "
            "mean; the uncertainty at seeding is the filter's prior, wider than a charge known "
            "by weight)"
        ),
    )
    parser.add_argument(
        "--max-hours", type=float, default=24.0, metavar="H", help="longest plan (default 24)"
    )
    parser.set_defaults(run=run_plan)


def run_plan(args: argparse.Namespace) -> int:
    site = load_site_file(args.config)
    zone = site_zone(site)
    index = 0
    if args.unit is not None:
        ids = [u.id for u in site.unit]
        if args.unit not in ids:
            raise PlanCommandError(f"{site.path}: no unit {args.unit!r} (units: {ids})")
        index = ids.index(args.unit)
    setup = pipeline_setup(site, index, zone)
    sensor = setup.sensor
    start_k = args.start_c + ZERO_CELSIUS_K
    final_k = setup.limits.final_temp_k if args.final_c is None else args.final_c + ZERO_CELSIUS_K
    conc = float(zone.solubility.c_sat(np.array(args.saturation_c + ZERO_CELSIUS_K)))
    sigma_max = args.sigma_max
    if sigma_max is None:
        rate = float(per_minute_to_per_second(site.controller.target_zone_rate_k_per_min))
        sigma_max = site.controller.target_fraction_of_zone * float(
            zone.sigma_limit(np.array(start_k), np.array(rate))
        )
    n = sensor.model.layout.size
    x, P = initial_state(start_k, conc, initial_vector(sensor.tuning), n)
    x[ZETA0 : ZETA3 + 1] += sensor.seed_zeta
    P = P + seed_covariance(sensor.seed_zeta, sensor.tuning, n)
    predictor = SigmaPredictor(sensor.model, sensor.tuning, zone.solubility).bind(x, P)
    try:
        result = minimum_time_profile(
            predictor,
            start_k,
            final_k,
            PlanSettings(
                sigma_max=sigma_max,
                max_cooling_rate_k_per_s=setup.limits.max_cooling_rate_k_per_s,
                max_duration_s=args.max_hours * 3600.0,
                confidence_k=args.confidence_k,
            ),
        )
    except ControllerError as error:
        raise PlanCommandError(f"{site.path}: no plan: {error}") from None
    comments = [
        f"site {site.site.name}, unit {setup.unit_id}, site file sha256 {site.sha256}",
        f"seeded at {args.start_c:g} °C, charge saturated at {args.saturation_c:g} °C, final "
        f"{final_k - ZERO_CELSIUS_K:g} °C",
        f"cap: sigma + {args.confidence_k:g} std <= {sigma_max:.4g} (peak on the model "
        f"{result.peak:.4g}); {result.profile.duration_s / 3600:.2f} h against "
        f"{result.linear_duration_s / 3600:.2f} h for the shortest linear ramp",
    ]
    profile = result.profile
    if args.out:
        try:
            with Path(args.out).open("w", encoding="utf-8", newline="") as stream:
                write_profile_csv(
                    stream, profile.name, profile.time_s, profile.temp_k, comments=comments
                )
        except OSError as error:
            raise PlanCommandError(f"{args.out}: cannot write: {error.strerror}") from None
    else:
        write_profile_csv(
            sys.stdout, profile.name, profile.time_s, profile.temp_k, comments=comments
        )
    print(
        f"plan: {result.profile.duration_s / 3600:.2f} h from {args.start_c:g} to "
        f"{final_k - ZERO_CELSIUS_K:g} °C (shortest linear ramp under the same cap "
        f"{result.linear_duration_s / 3600:.2f} h); peak forecast {result.peak:.4g} <= cap "
        f"{sigma_max:.4g}. {ADVISORY}",
        file=sys.stderr,
    )
    return 0 if result.converged or result.peak <= sigma_max else EXIT_FAILED

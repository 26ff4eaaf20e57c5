"""Options and steps shared by the commands that read one history file (estimate, optimise)."""
from __future__ import annotations

from estimators.core import PERIODS_PER_YEAR, SettingsError


def add_data_arguments(p) -> None:
    """DATA and the intake options: --kind, --frequency, --date-column, --missing."""
    p.add_argument("data", metavar="DATA",
                   help="history file: CSV or Parquet, a date column and one column per asset")
    p.add_argument("--kind", choices=("returns", "prices"),
                   help="what the cells hold (detected when unambiguous)")
    p.add_argument("--frequency", choices=tuple(PERIODS_PER_YEAR),
                   help="data frequency (default: inferred from the dates)")
    p.add_argument("--date-column", metavar="NAME", help="name of the date column")
    p.add_argument("--missing", choices=("raise", "drop-rows"), default="raise",
                   help="missing cells: an error (default) or drop those rows")


def add_estimator_arguments(p, *, see_also: str = "list below") -> None:
    """--mean, --covariance and the ewma's --half-life / --decay."""
    p.add_argument("--mean", default="sample", metavar="NAME",
                   help=f"mean estimator (default: sample; {see_also})")
    p.add_argument("--covariance", default="sample", metavar="NAME",
                   help=f"covariance estimator (default: sample; {see_also})")
    g = p.add_mutually_exclusive_group()
    g.add_argument("--half-life", type=float, metavar="H",
                   help="half-life of the ewma covariance, in periods (decay = 0.5**(1/H))")
    g.add_argument("--decay", type=float, metavar="L",
                   help="decay factor of the ewma covariance, 0 < L <= 1 "
                        "(0.94 for daily data is common practice)")


def estimator_params(args) -> dict:
    """The estimator parameters the options ask for; settings errors before any file is read."""
    for flag, value in (("--mean", args.mean), ("--covariance", args.covariance)):
        if value == "given":
            raise SettingsError(
                f"{flag} given: given moments come from an assumptions file in a study, "
                "not from this command"
            )
    ewma_flags = [f for f, v in (("--half-life", args.half_life), ("--decay", args.decay))
                  if v is not None]
    if args.covariance == "ewma" and not ewma_flags:
        raise SettingsError(
            "--covariance ewma needs --half-life H (in periods) or --decay L; a decay of "
            "0.94 for daily data is common practice"
        )
    if args.covariance != "ewma" and ewma_flags:
        raise SettingsError(f"{ewma_flags[0]} applies only to --covariance ewma")
    params = {}
    if args.half_life is not None:
        params["ewma_half_life"] = args.half_life
    if args.decay is not None:
        params["ewma_decay"] = args.decay
    return params


def load_history_from(args):
    """The history the DATA options describe (intake imported lazily: keeps --help fast)."""
    from noiseproof.intake import load_history

    return load_history(args.data, kind=args.kind, frequency=args.frequency,
                        date_column=args.date_column, missing=args.missing)

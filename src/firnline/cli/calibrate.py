"""``firnline calibrate CONFIG``: fit parameters to stakes, snow probing and glacier-wide balances."""

from __future__ import annotations

from .common import add_common, claim_output, config_and_out, progress_bars, say


def add_parser(sub) -> None:
    p = sub.add_parser("calibrate", help="fit model parameters to field and geodetic observations",
                       description="Fit the [calibration] parameters to the point and glacier-wide "
                                   "balances of [observations] (weighted least squares) and write "
                                   "calibration.json, calibration_residuals.csv, calibration_fit.png "
                                   "and calibrated.toml (the config with the fitted values).")
    add_common(p)
    p.add_argument("--no-report", action="store_true", help="skip calibration_report.html")
    p.set_defaults(func=main)


def main(args) -> int:
    from ..calibrate import calibrate, fit_table, write_calibration
    from ..provenance import CAUTION

    cfg, out = config_and_out(args)
    with claim_output(args, cfg, out, "calibrate"):
        result = calibrate(cfg, progress=progress_bars(args.quiet))
        for note in result.notes:
            say(args, note)
        files = write_calibration(result, out, report=not args.no_report)
    print(fit_table(result))
    say(args, f"wrote {len(files)} files to {out}; run the fitted model with: firnline run "
              f"{out / 'calibrated.toml'}")
    say(args, CAUTION)
    return 0

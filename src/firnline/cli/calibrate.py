"""``firnline calibrate CONFIG``: fit parameters to stakes, snow probing and glacier-wide balances."""

from __future__ import annotations

from .common import add_command, claim_output, config_and_out, progress_bars, say, wrote


def add_parser(sub) -> None:
    p = add_command(sub, "calibrate", "fit model parameters to field and geodetic observations",
                    "Fit the [calibration] parameters to the point and glacier-wide balances of "
                    "[observations] (weighted least squares) and write calibration.json, "
                    "calibration_residuals.csv, calibration_fit.png and calibrated.toml (the config "
                    "with the fitted values).", main)
    p.add_argument("--no-report", action="store_true", help="skip calibration_report.html")


def main(args) -> int:
    from ..calibrate import calibrate, fit_table, write_calibration

    cfg, out = config_and_out(args)
    with claim_output(args, cfg, out, "calibrate"):
        result = calibrate(cfg, progress=progress_bars(args.quiet))
        say(args, *result.notes)
        files = write_calibration(result, out, report=not args.no_report)
    print(fit_table(result))
    wrote(args, files, out, f"; run the fitted model with: firnline run {out / 'calibrated.toml'}")
    return 0

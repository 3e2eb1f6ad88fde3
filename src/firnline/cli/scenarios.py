"""``firnline scenarios CONFIG --warming K [K ...] [--precip-change PCT [PCT ...]] [--changes FILE ...]``.

Runs every combination of the warmings and precipitation changes (and always the
no-change reference), plus one scenario per monthly change file (named by its stem),
in one kernel pass and writes, all or nothing:

* ``scenarios.csv``, ``scenario_years.csv``, ``sensitivity.csv``, ``scenario_profiles.csv``,
  ``scenario_budget.csv`` (ELA0 and AAR0 per scenario), ``precip_offset.csv``
* ``mean_annual_balance_w<K>_p<PCT>.tif`` per scenario, e.g. ``mean_annual_balance_w+1.0_p+0.tif``,
  and ``mean_annual_balance_<stem>.tif`` per change file
* ``ela_vs_warming.png``, ``balance_vs_warming.png``, ``balance_profiles.png``
* ``scenarios.json`` (provenance, the rules of the means and slopes, flag counts)
"""

from __future__ import annotations

from ..errors import InputError
from .common import SCENARIO_OPTIONS, add_command, claim_output, config_and_out, progress_bars, say, wrote


def add_parser(sub) -> None:
    p = add_command(sub, "scenarios", "sweep warming and precipitation change: ELA, balance, sensitivity",
                    "Model every combination of the given warmings and precipitation changes (plus "
                    "the no-change reference) in one pass; write per-glacier means, per-year results, "
                    "dELA/dT and dB/dT, a mean-balance map per scenario and figures.", main)
    p.add_argument("--warming", nargs="*", metavar="K",
                   help="uniform warmings added to the station temperature, K (one or more; required)")
    p.add_argument("--precip-change", nargs="*", metavar="PCT",
                   help="precipitation changes, %% (each above -100; default 0)")
    p.add_argument("--no-report", action="store_true", help="skip scenarios_report.html")
    p.add_argument("--changes", nargs="*", metavar="FILE",
                   help="monthly change files (CSV: month, warming_k, precip_change_pct; 12 rows), one "
                        "scenario each, named by the file stem")


def main(args) -> int:
    if args.changes is not None and not args.changes:
        raise InputError("--changes needs one or more change files (CSV: month, warming_k, precip_change_pct).")
    if not args.warming and not args.changes:
        raise InputError("firnline scenarios needs --warming K [K ...] or --changes FILE [FILE ...]: give one "
                         "or more warmings in K, e.g. --warming 1 2 3, or monthly change files.")
    from ..model import prepare
    from ..parameters import radiation_defaults_notes
    from ..scenario_products import sweep_table, write_sweep
    from ..scenarios import scenario_definitions, sweep

    # checks the values and reads the change files before any work
    scen = scenario_definitions(args.warming or [], args.precip_change or [], args.changes or [],
                                names=SCENARIO_OPTIONS)
    monthly = [s for s in scen if s.source is not None]       # the change files, already read
    cfg, out = config_and_out(args)
    with claim_output(args, cfg, out, "scenarios", scenarios=len(scen), extra_inputs=args.changes or ()):
        progress = progress_bars(args.quiet)
        setup = prepare(cfg, progress)
        say(args, *setup.notes, *radiation_defaults_notes(cfg),
            f"{len(scen)} scenarios in one pass, reference (0 K, 0 %) included")
        result = sweep(setup, args.warming or [], args.precip_change or [], progress=progress, changes=monthly)
        files = write_sweep(result, out, report=not args.no_report)
    print(sweep_table(result))
    wrote(args, files, out)
    return 0

"""``firnline run CONFIG``: model every complete balance year and write the products."""

from __future__ import annotations

from .common import SCENARIO_OPTIONS, add_common, claim_output, config_and_out, progress_bars, say


def add_parser(sub) -> None:
    p = sub.add_parser("run", help="model the balance of every complete balance year",
                       description="Model the daily surface mass balance of every cell over every "
                                   "complete balance year and write maps, tables and run.json.")
    add_common(p)
    p.add_argument("--warming", type=float, default=0.0, metavar="K",
                   help="uniform warming added to the station temperature, K (default 0)")
    p.add_argument("--precip-change", type=float, default=0.0, metavar="PCT",
                   help="precipitation change, %% (default 0)")
    p.add_argument("--no-report", action="store_true",
                   help="skip report.html and its maps and charts (map_*.png, chart_*.png)")
    p.set_defaults(func=main)


def main(args) -> int:
    from ..model import run
    from ..products import summary_table, write_run
    from ..provenance import CAUTION
    from ..scenarios import scenario_list

    # the same checks as a sweep: finite, > -100 %
    scenario_list([args.warming], [args.precip_change], names=SCENARIO_OPTIONS)
    cfg, out = config_and_out(args)
    with claim_output(args, cfg, out, "run"):
        result = run(cfg, warming_k=args.warming, precip_change_pct=args.precip_change,
                     progress=progress_bars(args.quiet))
        for note in result.setup.notes:
            say(args, note)
        files = write_run(result, out, report=not args.no_report)
    print(summary_table(result.summary))
    say(args, f"wrote {len(files)} files to {out}")
    say(args, CAUTION)
    return 0

"""``firnline run CONFIG``: model every complete balance year and write the products."""

from __future__ import annotations

from .common import SCENARIO_OPTIONS, add_command, claim_output, config_and_out, progress_bars, say, wrote


def add_parser(sub) -> None:
    p = add_command(sub, "run", "model the balance of every complete balance year",
                    "Model the daily surface mass balance of every cell over every complete balance "
                    "year and write maps, tables and run.json.", main)
    p.add_argument("--warming", type=float, default=0.0, metavar="K",
                   help="uniform warming added to the station temperature, K (default 0)")
    p.add_argument("--precip-change", type=float, default=0.0, metavar="PCT",
                   help="precipitation change, %% (default 0)")
    p.add_argument("--no-report", action="store_true",
                   help="skip report.html and its maps and charts (map_*.png, chart_*.png)")


def gauge_line(g: dict) -> str:
    """One line of the scores against the gauge (NSE, KGE, volume error)."""
    def f(x, scale=1.0):
        return "n/a" if x is None else f"{scale * x:.2f}"
    return (f"discharge against {g['source']} over {g['days']} days ({g['first_day']} .. {g['last_day']}): "
            f"NSE {f(g['nse'])}, KGE {f(g['kge'])}, volume error {f(g['volume_error'], 100.0)} %")


def main(args) -> int:
    from ..model import run
    from ..products import summary_table, write_run
    from ..scenarios import scenario_list

    # the same checks as a sweep: finite, > -100 %
    scenario_list([args.warming], [args.precip_change], names=SCENARIO_OPTIONS)
    cfg, out = config_and_out(args)
    with claim_output(args, cfg, out, "run", streamed=True):
        result = run(cfg, warming_k=args.warming, precip_change_pct=args.precip_change,
                     progress=progress_bars(args.quiet))
        try:
            say(args, *result.notes)
            files = write_run(result, out, report=not args.no_report)
        finally:
            result.close()          # a large run's maps file beside the output folder
    print(summary_table(result.summary))
    if result.gauge is not None:
        say(args, gauge_line(result.gauge))
    wrote(args, files, out)
    return 0

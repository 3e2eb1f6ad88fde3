"""What runoff adds to a demo run: the kernel's daily region sums, routing, runoff files, hydrograph.

Target (issue 12): routing and the daily series add at most 10 % to a demo run, with no
array of days x cells (the kernel sums the released water per region each day).

Measured in one process on the shipped demo (``configs/demo.toml``), best of several repeats
(the machine may be shared):

* the kernel without the daily region sums (``simulate(..., daily=False)``) and with them;
* routing the daily series through the reservoirs and scoring it against the gauge
  (:func:`firnline.model.runoff_of`);
* writing runoff.csv, runoff_monthly.csv and runoff.nc (:func:`write_run_runoff`);
* drawing the hydrograph figure to PNG;
* the whole demo run with its report (``run`` + ``write_run``), for the share.

    python benchmarks/runoff.py [--repeat 3]
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

from timing import best_of  # noqa: E402  (benchmarks/ is on sys.path when run)

REPO = Path(__file__).resolve().parent.parent


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--config", default=str(REPO / "configs" / "demo.toml"))
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()
    import firnline
    from firnline.charts import png_bytes
    from firnline.model import prepare, run, runoff_of, simulate
    from firnline.outdir import staged
    from firnline.products import write_run
    from firnline.runoff_products import hydrograph_figure, write_run_runoff

    cfg = firnline.load_config(args.config)
    setup = prepare(cfg)
    year_start = cfg.balance.year_start
    kres = simulate(setup, cfg)                                           # warm-up (numba)
    simulate(setup, cfg, daily=False)
    t_plain = best_of(lambda: simulate(setup, cfg, daily=False), args.repeat)
    t_daily = best_of(lambda: simulate(setup, cfg, daily=True), args.repeat)
    series, gauge = runoff_of(setup, cfg, kres)
    t_route = best_of(lambda: runoff_of(setup, cfg, kres), args.repeat)
    with tempfile.TemporaryDirectory() as td:
        def files():
            with staged(Path(td) / "runoff") as st:
                write_run_runoff(st, series, year_start, {"title": "benchmark"})
        files()
        t_files = best_of(files, args.repeat)
        png_bytes(hydrograph_figure(series, year_start, setup.discharge, gauge, cfg.site.name))
        t_fig = best_of(lambda: png_bytes(hydrograph_figure(series, year_start, setup.discharge, gauge,
                                                            cfg.site.name)), args.repeat)

        def whole():
            result = run(cfg, setup=setup)
            write_run(result, Path(td) / "run")
        whole()
        t_run = best_of(whole, args.repeat)
    t_prepare0 = time.perf_counter()
    prepare(cfg)
    t_prepare = time.perf_counter() - t_prepare0
    t_total = t_run + t_prepare
    added = (t_daily - t_plain) + t_route + t_files + t_fig
    n_cells, n_days = setup.cells.size, setup.forcing.n_days
    print("\n".join([
        f"demo: {n_cells} cells, {n_days} days, {len(series.regions)} regions",
        f"kernel without daily region sums: {t_plain:.2f} s; with them: {t_daily:.2f} s "
        f"({t_daily - t_plain:+.2f} s)",
        f"routing and gauge scores: {t_route * 1e3:.1f} ms",
        f"runoff.csv, runoff_monthly.csv, runoff.nc: {t_files:.2f} s",
        f"hydrograph figure: {t_fig:.2f} s",
        f"whole demo run (prepare {t_prepare:.1f} s + run and write with report {t_run:.1f} s): {t_total:.1f} s",
        f"runoff adds {added:.2f} s = {100 * added / (t_total - added):.1f} % of the run without it "
        f"(target <= 10 %)",
    ]))


if __name__ == "__main__":
    main()

"""Calibration speed: the demo's two degree-day factors fitted to its invented observations.

Prints the number of model evaluations, the wall time of the fit (inputs read once,
then one restricted kernel run per evaluation), the time per evaluation, the cells
and days each evaluation runs, and the fitted values beside the invented "true"
factors the demo observations were made with. Target (issue 6): well under two
minutes for two parameters.

    python benchmarks/calibrate.py [--config configs/demo_calibrate.toml]
"""

from __future__ import annotations

import argparse
import time
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--config", default=str(REPO / "configs" / "demo_calibrate.toml"))
    args = ap.parse_args()

    import firnline
    from firnline.calibrate import build_operator, calibrate
    from firnline.demo import DEMO_TRUE_FACTORS
    from firnline.model import prepare
    from firnline.observations import load_observations

    cfg = firnline.load_config(args.config)
    t0 = time.perf_counter()
    setup = prepare(cfg)
    t1 = time.perf_counter()
    op = build_operator(setup, *load_observations(cfg, setup))
    result = calibrate(cfg, setup=setup)
    t2 = time.perf_counter()
    fit_s = result.elapsed_s
    print(f"config: {args.config}")
    print(f"observations: {result.n_obs}; parameters: {len(result.spec.parameters)}")
    print(f"cells per evaluation: {op.positions.size} of {setup.cells.size} valid cells; "
          f"days per evaluation: {op.n_days} of {setup.forcing.n_days}")
    print(f"model evaluations: {result.n_evaluations}")
    print(f"prepare (read inputs once): {t1 - t0:.2f} s")
    print(f"fit: {fit_s:.2f} s ({fit_s / result.n_evaluations:.3f} s per evaluation); "
          f"total with prepare: {t2 - t0:.2f} s")
    for p, v in result.value.items():
        truth = DEMO_TRUE_FACTORS.get(p)
        extra = f"  (invented truth {truth:g}, {(v - truth) / result.std_error[p]:+.1f} SE)" if truth else ""
        print(f"  {p} = {v:.4f} +/- {result.std_error[p]:.4f}{extra}")
    print(f"RMSE {result.rmse_mwe:.3f} m w.e., bias {result.bias_mwe:+.3f} m w.e.")
    for w in result.warnings:
        print(f"warning: {w}")


if __name__ == "__main__":
    main()

"""Check that an output folder of `firnline run` holds every contracted file (DESIGN.md, README)."""

import json
import sys
from pathlib import Path

out = Path(sys.argv[1])
if not out.is_dir():
    sys.exit(f"{out}: no output folder")
info = json.loads((out / "run.json").read_text())
years = info["record"]["balance_years"]
need = ["summary.csv", "profiles.csv", "run.json", "balance.nc", "balanced_budget.csv",
        "mean_annual_balance.tif", "glacier_id.tif", ".firnline-manifest.json"]
for y in years:
    need += [f"{p}_{y}.tif" for p in ("annual_balance", "winter_balance", "summer_balance",
                                      "accumulation", "ablation")]
missing = [n for n in need if not (out / n).is_file() or (out / n).stat().st_size == 0]
if missing:
    sys.exit(f"{out}: missing or empty: {', '.join(missing)}")
listed = set(json.loads((out / ".firnline-manifest.json").read_text())["files"])
unlisted = sorted(n for n in need if n not in listed and n != ".firnline-manifest.json")
if unlisted:
    sys.exit(f"{out}: not in the manifest: {', '.join(unlisted)}")
left = sorted(p.name for p in out.parent.iterdir() if ".firnline-" in p.name and p.name.startswith(f".{out.name}."))
if left:
    sys.exit(f"{out.parent}: work entries left behind: {', '.join(left)}")
print(f"{out}: all {len(need)} contracted files for {len(years)} balance years are there")

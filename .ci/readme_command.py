"""Print the N-th command of README.md's "## Set up" section (the line inside its N-th ``` block)."""

import sys
from pathlib import Path

n = int(sys.argv[1])
text = Path(__file__).resolve().parents[1].joinpath("README.md").read_text(encoding="utf-8")
section = text.split("\n## Set up", 1)[1].split("\n## ", 1)[0]
blocks = section.split("```")[1::2]
if len(blocks) < n:
    sys.exit(f"README.md: the Set up section has {len(blocks)} command blocks, not {n}")
lines = [ln for ln in blocks[n - 1].strip("\n").splitlines() if ln.strip()]
if len(lines) != 1:
    sys.exit(f"README.md: command block {n} of Set up must hold exactly one line, it holds {len(lines)}")
print(lines[0])

"""Writes a long readings file for the replay memory benchmark (BENCHMARKS.md).

FF-T12 of config/demo.toml draining through a 40 mm hole 0.3 m above the
bottom (Cd 0.61), one row a second, by the analytic Torricelli solution of
a vertical cylinder, with 1 mm of Gaussian level noise. The file is invented
data for measuring memory, not a reference; leaktally's physics is checked
elsewhere (tests/references.rs).

    python3 tools/readings_rows.py 1000000 million.csv
"""

import math
import random
import sys


def main() -> None:
    rows, out = int(sys.argv[1]), sys.argv[2]
    random.seed(1)
    level0, hole, cd, diameter, tank = 4.2, 0.3, 0.61, 0.040, 3.0
    # sqrt(h - z) falls linearly: d/dt sqrt(h - z) = -Cd a sqrt(2 g) / (2 A).
    k = cd * (math.pi * diameter**2 / 4) * math.sqrt(2 * 9.80665) / (2 * math.pi * tank**2 / 4)
    start = 1796119200  # 2026-12-01T10:00:00Z
    with open(out, "w") as f:
        f.write("utc,tank,level_m\n")
        for i in range(rows):
            s = max(math.sqrt(level0 - hole) - k * i, 0.0)
            f.write(f"{start + i},FF-T12,{s * s + hole + random.gauss(0, 0.001):.4f}\n")


if __name__ == "__main__":
    main()

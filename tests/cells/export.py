"""Reference grid cells from the H3 library's own Python binding (PyPI `h3`),
for tests/cells.rs: the cell of each position at every resolution, and the
cells within k rings of some of them.

Positions: a seeded random spread over the sphere, the poles, both sides of
the antimeridian, the equator and prime meridian, and the centres (and
points just beside them) of every pentagon at every resolution.

Usage: python3 export.py OUT_DIR  (writes OUT_DIR/cells.json)
"""

import json
import math
import random
import sys
from pathlib import Path

import h3


def positions():
    rng = random.Random(20261205)
    out = []
    for _ in range(2000):
        # Uniform on the sphere: latitude from the arcsine of a uniform draw.
        out.append((math.degrees(math.asin(rng.uniform(-1.0, 1.0))), rng.uniform(-180.0, 180.0)))
    for lat in (90.0, -90.0, 89.999999, -89.999999):
        for lon in (0.0, 45.0, -135.0, 180.0):
            out.append((lat, lon))
    for lat in (-60.0, -12.5, 0.0, 0.000001, 33.3, 71.0):
        for lon in (180.0, -180.0, 179.999999, -179.999999, 0.0, -0.0):
            out.append((lat, lon))
    for res in range(16):
        for pentagon in h3.get_pentagons(res):
            lat, lon = h3.cell_to_latlng(pentagon)
            out.append((lat, lon))
            out.append((lat + 1e-7, lon - 1e-7))
    return out


def main():
    out_dir = Path(sys.argv[1])
    out_dir.mkdir(parents=True, exist_ok=True)
    cases = []
    for i, (lat, lon) in enumerate(positions()):
        cells = [h3.latlng_to_cell(lat, lon, res) for res in range(16)]
        case = {"lat": lat, "lon": lon, "cells": cells}
        if i % 40 == 0:
            res = i % 16
            case["disk"] = {"resolution": res, "k": 1 + i % 3, "cells": sorted(h3.grid_disk(cells[res], 1 + i % 3))}
        cases.append(case)
    (out_dir / "cells.json").write_text(json.dumps({"h3": h3.__version__, "cases": cases}))
    print(f"wrote {len(cases)} positions' cells to {out_dir / 'cells.json'} (h3 {h3.__version__})")


if __name__ == "__main__":
    main()

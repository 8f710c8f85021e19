#!/usr/bin/env python3
"""SciPy's numbers for the charge-taper model (models/charge-taper), the
outside reference for the Python and JavaScript guests (tests/guests.rs).

    python3 tests/guests/taper_reference.py PARAMS OUT_DIR

The model's minutes are 60 · battery_kwh / (charger_kw · efficiency) times
the integral of 1 / taper(s) over [soc_start, soc_target], taper linear
between knots. Here the taper is numpy.interp over the knots and the
integral is scipy.integrate.quad (QUADPACK), told where the knots are and
asked for 1e-13 relative accuracy: an independent, numerical route to the
value the guests work out in closed form.

Writes, with the library versions that produced them:
- `taper-reference.json`: rows and SciPy's minutes for each;
- `charge-taper.checks.json`: the first 40 of them as paddock checks, which
  `paddock pack` runs when it builds each guest.
The rows: 300 drawn with numpy's PCG64 (seed 20261201) over the contract's
ranges, plus edge rows (target at or below start, full range 0 → 1, a span
inside one segment, spans ending on a knot).
"""
import json
import os
import platform
import sys

import numpy
import scipy
from scipy.integrate import quad

FEATURES = ["charger_kw", "battery_kwh", "soc_start", "soc_target"]


def minutes(params, kw, kwh, s0, s1):
    if s1 <= s0:
        return 0.0
    xs = [k[0] for k in params["taper"]]
    ys = [k[1] for k in params["taper"]]
    inside = [x for x in xs if s0 < x < s1]
    integral, err = quad(lambda s: 1.0 / numpy.interp(s, xs, ys), s0, s1, points=inside or None,
                         epsabs=0.0, epsrel=1e-13, limit=200)
    assert err <= 1e-11 * abs(integral), (s0, s1, integral, err)
    return 60.0 * kwh / (kw * params["efficiency"]) * integral


def rows():
    rng = numpy.random.Generator(numpy.random.PCG64(20261201))
    out = [
        [11.0, 64.0, 0.2, 0.95],
        [50.0, 77.0, 0.0, 1.0],
        [7.4, 40.0, 0.6, 0.6],
        [7.4, 40.0, 0.7, 0.3],
        [150.0, 90.0, 0.1, 0.5],
        [22.0, 100.0, 0.55, 0.8],
        [350.0, 250.0, 0.8, 0.9],
        [1.0, 5.0, 0.0, 0.01],
    ]
    for _ in range(300):
        s = sorted(rng.uniform(0.0, 1.0, 2))
        out.append([round(float(rng.uniform(1.0, 350.0)), 1), round(float(rng.uniform(5.0, 250.0)), 1),
                    round(float(s[0]), 3), round(float(s[1]), 3)])
    return out


def main():
    params_path, out_dir = sys.argv[1], sys.argv[2]
    with open(params_path) as f:
        params = json.load(f)
    os.makedirs(out_dir, exist_ok=True)
    data = rows()
    want = [minutes(params, *r) for r in data]
    versions = {"python": platform.python_version(), "scipy": scipy.__version__, "numpy": numpy.__version__}
    with open(os.path.join(out_dir, "taper-reference.json"), "w") as f:
        json.dump({"features": FEATURES, "rows": data, "minutes": want, "versions": versions}, f)
    checks = {
        "source": f"scipy.integrate.quad {scipy.__version__} over numpy.interp {numpy.__version__} "
                  "(tests/guests/taper_reference.py)",
        "tolerance": {"abs": 1e-9, "rel": 1e-9},
        "cases": [{"row": dict(zip(FEATURES, r)), "expect": {"session_minutes": m}} for r, m in zip(data[:40], want[:40])],
    }
    with open(os.path.join(out_dir, "charge-taper.checks.json"), "w") as f:
        json.dump(checks, f, indent=1)
    print(f"taper reference: {len(data)} rows ({versions})")


if __name__ == "__main__":
    main()

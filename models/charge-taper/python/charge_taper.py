"""charge-taper, in plain Python: minutes a plug-in session needs to reach
its target state of charge, when the car draws less than the charger's
power as the battery fills.

The params (JSON) give the charging efficiency and the taper: knots
(state of charge, fraction of charger power the car draws), linear between
knots. The minutes are the integral of battery_kwh / (charger_kw ·
efficiency · taper(s)) over s from soc_start to soc_target, worked out
exactly segment by segment (the integral of 1/(a + b·s) is a logarithm).

Built into a component with componentize-py against paddock's wit/ (see
the README, "Bring your model"). The same model, in JavaScript, is in
../js/; both are checked against SciPy's numerical integration.
"""

import json
import math

import wit_world
from componentize_py_types import Err
from wit_world import Bounds, Contract, Domain_Real, Fault_Rejected, Feature, Output

FEATURES = [
    Feature("charger_kw", Domain_Real(Bounds(1.0, 350.0)), "kW", True, "power the charger can deliver"),
    Feature("battery_kwh", Domain_Real(Bounds(5.0, 250.0)), "kWh", True, "usable battery capacity"),
    Feature("soc_start", Domain_Real(Bounds(0.0, 1.0)), None, True, "state of charge at plug-in, 0-1"),
    Feature("soc_target", Domain_Real(Bounds(0.0, 1.0)), None, True, "state of charge wanted, 0-1"),
]
OUTPUTS = [Output("session_minutes", "min", Bounds(0.0, None), "minutes to reach the target")]

model = None


class Taper:
    def __init__(self, params):
        knots = params["taper"]
        if len(knots) < 2 or knots[0][0] != 0.0 or knots[-1][0] != 1.0:
            raise ValueError("taper knots must run from state of charge 0 to 1")
        for (s0, f0), (s1, f1) in zip(knots, knots[1:]):
            if not s1 > s0:
                raise ValueError(f"taper knots must rise: {s0} then {s1}")
            if not (f0 > 0 and f1 > 0):
                raise ValueError("taper fractions must be above 0")
        self.knots = [(float(s), float(f)) for s, f in knots]
        self.efficiency = float(params["efficiency"])
        if not 0 < self.efficiency <= 1:
            raise ValueError("efficiency must be in (0, 1]")
        self.version = params["version"]

    def hours_per_kwh_of_capacity(self, lo, hi):
        """Integral of 1 / taper(s) ds over [lo, hi]."""
        total = 0.0
        for (s0, f0), (s1, f1) in zip(self.knots, self.knots[1:]):
            a, b = max(s0, lo), min(s1, hi)
            if b <= a:
                continue
            slope = (f1 - f0) / (s1 - s0)
            fa, fb = f0 + slope * (a - s0), f0 + slope * (b - s0)
            total += (b - a) / fa if slope == 0.0 else math.log(fb / fa) / slope
        return total

    def minutes(self, kw, kwh, soc_start, soc_target):
        if soc_target <= soc_start:
            return 0.0
        return 60.0 * kwh / (kw * self.efficiency) * self.hours_per_kwh_of_capacity(soc_start, soc_target)


class WitWorld(wit_world.WitWorld):
    def init(self, params: bytes) -> None:
        global model
        try:
            model = Taper(json.loads(params))
        except (ValueError, KeyError, TypeError) as e:
            raise Err(f"charge-taper params: {e}")

    def describe(self) -> Contract:
        return Contract(
            "charge-taper",
            model.version,
            FEATURES,
            OUTPUTS,
            "Minutes a session needs to reach its target charge, with the car's power taper (Python guest).",
        )

    def score(self, rows: int, cells):
        width = len(FEATURES)
        if len(cells) != rows * width:
            raise Err(Fault_Rejected(f"{len(cells)} cells do not make {rows} rows"))
        return [model.minutes(*cells[r * width:(r + 1) * width]) for r in range(rows)]

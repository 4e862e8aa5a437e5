"""Maximum-power-point tracking: perturb and observe with an adaptive step.

Pure logic, no instrument: :meth:`PerturbObserve.next_voltage` receives each new
(voltage, power) observation and answers the next voltage to apply. Power is in the
generator convention (positive when the cell delivers power).

The step grows (x1.5) once two moves in a row, in the same direction, have improved the
power, so the tracker climbs quickly from a poor start or follows a moving MPP; it halves
at every reversal, so it settles into a small dither around the MPP. (Growing on the first
improvement after a reversal would make it overshoot again and cycle.) It never drops below a quarter of the
nominal step (a tracker that stops moving cannot notice the MPP drifting) nor exceeds
eight times it.
"""
from __future__ import annotations

GROWTH = 1.5
SHRINK = 0.5
MIN_STEP_FRACTION = 0.25
MAX_STEP_FACTOR = 8.0


class PerturbObserve:
    def __init__(self, *, step_v: float, v_min: float, v_max: float):
        if step_v <= 0 or v_max <= v_min:
            raise ValueError("need step_v > 0 and v_max > v_min")
        self.nominal = step_v
        self.step = step_v
        self.v_min = v_min
        self.v_max = v_max
        self.direction = 1.0
        self._improved_in_a_row = 0
        self._last_power: float | None = None

    def clamp(self, voltage_v: float) -> float:
        return min(self.v_max, max(self.v_min, voltage_v))

    def next_voltage(self, voltage_v: float, power_w: float) -> float:
        """Given the power observed at ``voltage_v`` after the last move, the next voltage."""
        if self._last_power is not None:
            if power_w > self._last_power:
                self._improved_in_a_row += 1
                if self._improved_in_a_row >= 2:
                    self.step = min(self.step * GROWTH, self.nominal * MAX_STEP_FACTOR)
            else:
                self._improved_in_a_row = 0
                self.direction = -self.direction
                self.step = max(self.step * SHRINK, self.nominal * MIN_STEP_FRACTION)
        self._last_power = power_w
        target = self.clamp(voltage_v + self.direction * self.step)
        if target == voltage_v:          # pinned at a bound: turn round
            self.direction = -self.direction
            self._improved_in_a_row = 0
            target = self.clamp(voltage_v + self.direction * self.step)
        return target

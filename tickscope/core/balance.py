"""The balance and the pendulum: published relations between their motion and what is heard (pure).

* Lift time and amplitude of a lever escapement (simple harmonic motion of the balance,
  shared/domain.md section 10.3): the balance passes the lift angle LA in
  t_lift = (T / pi) arcsin(LA / (2 A)), so A = LA / (2 sin(pi t_lift / T)), T the balance period.
* Circular error of a pendulum (small-angle series, domain.md 10.5): T = T0 (1 + theta0^2 / 16).
"""
from __future__ import annotations

import math


def lift_time_s(*, lift_angle_deg: float, amplitude_deg: float, period_s: float) -> float:
    """Time the balance takes through the lift angle: ``(T / pi) arcsin(LA / (2 A))``."""
    return period_s / math.pi * math.asin(lift_angle_deg / (2.0 * amplitude_deg))


def amplitude_from_lift_time(*, lift_angle_deg: float, lift_time_s: float, period_s: float) -> float:
    """The balance amplitude from its lift time: ``A = LA / (2 sin(pi t_lift / T))``."""
    return lift_angle_deg / (2.0 * math.sin(math.pi * lift_time_s / period_s))


def circular_error_factor(semi_arc_deg: float) -> float:
    """A pendulum's period over its small-swing period: ``1 + theta0^2 / 16``."""
    th = math.radians(semi_arc_deg)
    return 1.0 + th * th / 16.0

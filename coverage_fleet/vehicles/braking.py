"""Braking helper shared by models with first-order (linearly damped) velocity states."""

from __future__ import annotations

import math


def stopping_force(mass: float, damping: float, speed: float, period: float) -> float:
    """Constant force that brings m s' + d s = F from `speed` to exactly zero in `period`
    (closed-form solution of the first-order linear ODE: s(T) = F/d + (s0 - F/d) e^(-dT/m);
    common practice). With d = 0 it is the constant deceleration -m s0 / T."""
    if damping <= 0.0:
        return -mass * speed / period
    return -damping * speed / math.expm1(damping * period / mass)

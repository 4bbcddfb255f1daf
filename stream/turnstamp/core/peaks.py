"""One peak of a pulse template: von Mises or wrapped Gaussian, in our template format.

The shape's Fourier coefficients are analytic (I_k(κ)/I_0(κ) for von Mises,
exp(−2π²k²σ²) for the wrapped Gaussian), so template matching never needs a
numerical transform of a peak.
"""

from __future__ import annotations

import math
from typing import Literal

import numpy as np
from pydantic import BaseModel, ConfigDict, field_validator
from scipy import special

from .cycles import wrap_cycles

__all__ = ["PeakComponent"]


class PeakComponent(BaseModel):
    """One peak of the pulsed shape.

    Attributes
    ----------
    shape : {"von_mises", "gaussian"}
        Peak form. ``gaussian`` is wrapped onto the cycle.
    position_cycles : float
        Peak centre, cycles, 0 ≤ position < 1.
    width_cycles : float
        Gaussian σ in cycles (> 0). For ``von_mises`` the concentration is
        κ = 1/(2π·width)², so that a narrow von Mises peak has the same σ.
    amplitude : float
        Relative area of this peak (> 0); the areas are normalised over all peaks.
    """

    model_config = ConfigDict(frozen=True, extra="forbid")

    shape: Literal["von_mises", "gaussian"]
    position_cycles: float
    width_cycles: float
    amplitude: float = 1.0

    @field_validator("position_cycles")
    @classmethod
    def _check_position(cls, v: float) -> float:
        if not (math.isfinite(v) and 0.0 <= v < 1.0):
            raise ValueError(f"position_cycles = {v!r}: must be in [0, 1) cycles")
        return v

    @field_validator("width_cycles")
    @classmethod
    def _check_width(cls, v: float) -> float:
        if not (math.isfinite(v) and v > 0.0):
            raise ValueError(f"width_cycles = {v!r}: must be a finite number > 0 cycles")
        return v

    @field_validator("amplitude")
    @classmethod
    def _check_amplitude(cls, v: float) -> float:
        if not (math.isfinite(v) and v > 0.0):
            raise ValueError(f"amplitude = {v!r}: must be a finite number > 0")
        return v

    @property
    def kappa(self) -> float:
        """von Mises concentration κ = 1/(2π·width_cycles)² (dimensionless)."""
        return 1.0 / (2.0 * math.pi * self.width_cycles) ** 2

    def fourier(self, k: np.ndarray) -> np.ndarray:
        """Fourier coefficients ∫ g(φ) e^{+2πikφ} dφ of this peak at unit area."""
        k = np.asarray(k, dtype=float)
        if self.shape == "von_mises":
            kappa = self.kappa
            damping = special.ive(k, kappa) / special.ive(0, kappa)
        else:
            damping = np.exp(-2.0 * math.pi**2 * k**2 * self.width_cycles**2)
        return damping * np.exp(2j * math.pi * k * self.position_cycles)

    def density(self, phases: np.ndarray) -> np.ndarray:
        """Unit-area density of this peak at ``phases`` (cycles), per cycle."""
        phases = np.asarray(phases, dtype=float)
        if self.shape == "von_mises":
            kappa = self.kappa
            angle = 2.0 * math.pi * (phases - self.position_cycles)
            # exp(κ cos θ)/I₀(κ) per radian × 2π rad/cycle ÷ 2π normalisation
            return np.exp(kappa * (np.cos(angle) - 1.0)) / special.ive(0, kappa)
        sigma = self.width_cycles
        delta = np.asarray(wrap_cycles(phases - self.position_cycles), dtype=float)
        wraps = int(math.ceil(8.0 * sigma)) + 1
        total = np.zeros_like(delta)
        for n in range(-wraps, wraps + 1):
            total = total + np.exp(-0.5 * ((delta + n) / sigma) ** 2)
        return total / (sigma * math.sqrt(2.0 * math.pi))

    def sample(self, n: int, rng: np.random.Generator) -> np.ndarray:
        """Draw ``n`` phases (cycles, [0, 1)) from this peak."""
        if self.shape == "von_mises":
            kappa = self.kappa
            angle = rng.vonmises(0.0, kappa, size=n)
            return np.remainder(self.position_cycles + angle / (2.0 * math.pi), 1.0)
        return np.remainder(rng.normal(self.position_cycles, self.width_cycles, size=n), 1.0)

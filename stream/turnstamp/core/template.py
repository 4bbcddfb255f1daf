"""Pulse templates: the expected pulse shape over one rotation, in our own format.

Theory of operation
-------------------
A template describes the expected pulse shape over one rotation: an unpulsed
(flat) part plus a *pulsed shape* s(φ) of unit area on φ ∈ [0, 1) cycles. The
pulsed shape is either a sum of peaks (:class:`~turnstamp.core.peaks.PeakComponent`,
von Mises or wrapped Gaussian) or a binned profile read as a step function. Its
Fourier coefficients are

    S_k = ∫₀¹ s(φ) e^{+2πikφ} dφ,        k = 1, 2, …

with the same sign as the data moments of ``turnstamp.core.moments.PhaseMoments``,
P_k = Σ w e^{+2πikφ} = cos_sums + i·sin_sums. The offset of data against a
template is fitted in :mod:`turnstamp.core.templatefit`.

Templates are pydantic models (stored as TOML by the shell).
"""

from __future__ import annotations

import math

import numpy as np
from pydantic import BaseModel, ConfigDict, field_validator, model_validator

from .peaks import PeakComponent

__all__ = ["PulseTemplate", "RELATIVE_POWER_CUT"]

RELATIVE_POWER_CUT = 1e-3
"""Harmonics with |S_k| ≤ this × the strongest |S_j| carry no template power."""


class PulseTemplate(BaseModel):
    """Expected pulse shape of one target, in turnstamp's own template format.

    Exactly one of ``components`` and ``binned_profile`` is given.

    Attributes
    ----------
    name : str
        Template name (non-empty).
    description : str, optional
        Free text.
    components : list of PeakComponent, optional
        Peaks whose relative areas are their ``amplitude``.
    binned_profile : list of float, optional
        At least 8 non-negative values; bin i of n is centred at (i + 0.5)/n cycles.
        The profile is read as a step function; its minimum is taken as the
        unpulsed level, so the pulsed shape is (profile − min) at unit area.
    unpulsed_fraction : float
        Fraction (0..1) of events in the flat part. Used only by ``density`` and
        ``sample`` (drawing and simulation); the offset fit estimates its own amplitude.
    """

    model_config = ConfigDict(frozen=True, extra="forbid")

    name: str
    description: str | None = None
    components: list[PeakComponent] | None = None
    binned_profile: list[float] | None = None
    unpulsed_fraction: float = 0.5

    @model_validator(mode="before")
    @classmethod
    def _a_template(cls, data):
        """A file of another kind, said as such rather than as a list of unknown fields."""
        if isinstance(data, dict) and not {"components", "binned_profile"} & data.keys():
            for key, kind in (("frequency_hz", "a spin model"),
                              ("site", "a site file or a service configuration")):
                if key in data:
                    raise ValueError(f"this is {kind} (it has '{key}'), not a pulse template")
        return data

    @field_validator("name")
    @classmethod
    def _check_name(cls, v: str) -> str:
        if not v.strip():
            raise ValueError(f"name = {v!r}: must not be empty")
        return v

    @field_validator("components")
    @classmethod
    def _check_components(cls, v: list[PeakComponent] | None) -> list[PeakComponent] | None:
        if v is not None and len(v) == 0:
            raise ValueError("components = []: give at least one peak, or use binned_profile")
        return v

    @field_validator("binned_profile")
    @classmethod
    def _check_binned(cls, v: list[float] | None) -> list[float] | None:
        if v is None:
            return v
        if len(v) < 8:
            raise ValueError(f"binned_profile has {len(v)} values: at least 8 are needed")
        values = np.asarray(v, dtype=float)
        bad = np.flatnonzero(~np.isfinite(values) | (values < 0))
        if bad.size:
            i = int(bad[0])
            raise ValueError(
                f"binned_profile[{i}] = {v[i]!r}: values must be finite and non-negative"
            )
        if not values.max() > values.min():
            raise ValueError(
                f"binned_profile = all {values[0]!r}: a flat profile has no pulsed shape"
            )
        return v

    @field_validator("unpulsed_fraction")
    @classmethod
    def _check_unpulsed(cls, v: float) -> float:
        if not (math.isfinite(v) and 0.0 <= v <= 1.0):
            raise ValueError(f"unpulsed_fraction = {v!r}: must be in [0, 1]")
        return v

    @model_validator(mode="after")
    def _exactly_one_shape(self) -> PulseTemplate:
        if (self.components is None) == (self.binned_profile is None):
            given = "both" if self.components is not None else "neither"
            raise ValueError(
                f"components / binned_profile: {given} given; exactly one of the two is required"
            )
        return self

    # ----------------------------------------------------------------------------------

    @property
    def max_harmonic(self) -> int | None:
        """Largest harmonic a binned template resolves (n_bins // 2), None for peaks."""
        return None if self.binned_profile is None else len(self.binned_profile) // 2

    def _pulsed_bins(self) -> np.ndarray:
        values = np.asarray(self.binned_profile, dtype=float)
        pulsed = values - values.min()
        return pulsed / pulsed.mean()  # unit area on [0, 1)

    def fourier(self, harmonics: int) -> np.ndarray:
        """Fourier coefficients of the pulsed shape.

        Parameters
        ----------
        harmonics : int
            Number of harmonics m (≥ 1).

        Returns
        -------
        numpy.ndarray of complex, shape (m,)
            S_k = ∫₀¹ s(φ) e^{+2πikφ} dφ for k = 1..m, with s of unit area (S_0 = 1).
            A peak at position μ has arg S_k = 2πkμ. von Mises peaks give
            I_k(κ)/I_0(κ), wrapped Gaussians exp(−2π²k²σ²); a binned profile gives
            its DFT times the bin-width factor sinc(k/n) of a step function.
        """
        k = np.arange(1, int(harmonics) + 1)
        if self.components is not None:
            total = sum(c.amplitude for c in self.components)
            out = np.zeros(k.size, dtype=complex)
            for c in self.components:
                out += c.amplitude * c.fourier(k)
            return out / total
        pulsed = self._pulsed_bins()
        n = pulsed.size
        centres = (np.arange(n) + 0.5) / n
        dft = np.exp(2j * np.pi * np.outer(k, centres)) @ pulsed / n
        return dft * np.sinc(k / n)

    def useful_harmonics(self, limit: int, relative: float = RELATIVE_POWER_CUT) -> int:
        """Number of harmonics worth fitting: up to the last k ≤ ``limit`` with power.

        Parameters
        ----------
        limit : int
            Largest harmonic available in the data.
        relative : float
            A harmonic has power when |S_k| > ``relative`` × max_j |S_j|.

        Returns
        -------
        int
            The largest such k (at least 1; at most n_bins//2 for a binned template).
        """
        cap = int(limit) if self.max_harmonic is None else min(int(limit), self.max_harmonic)
        cap = max(cap, 1)
        mag = np.abs(self.fourier(cap))
        strong = np.flatnonzero(mag > relative * mag.max())
        return int(strong[-1]) + 1 if strong.size else 1

    def density(self, phases) -> np.ndarray:
        """Full profile density (unpulsed + pulsed), mean 1 over a cycle.

        Parameters
        ----------
        phases : array_like
            Phases in cycles (any real value; the profile is periodic).

        Returns
        -------
        numpy.ndarray
            u + (1 − u)·s(φ) per cycle, u = ``unpulsed_fraction``.
        """
        u = self.unpulsed_fraction
        return u + (1.0 - u) * self.pulsed_density(phases)

    def pulsed_density(self, phases) -> np.ndarray:
        """The pulsed shape s(φ) alone, unit area over a cycle.

        Parameters
        ----------
        phases : array_like
            Phases in cycles (any real value).

        Returns
        -------
        numpy.ndarray
            s(φ) per cycle.
        """
        phases = np.asarray(phases, dtype=float)
        if self.components is not None:
            total = sum(c.amplitude for c in self.components)
            out = np.zeros_like(phases)
            for c in self.components:
                out = out + c.amplitude * c.density(phases)
            return out / total
        values = self._pulsed_bins()
        index = np.floor(np.remainder(phases, 1.0) * values.size).astype(np.int64)
        return values[np.minimum(index, values.size - 1)]

    def sample(self, n: int, rng: np.random.Generator) -> np.ndarray:
        """Draw ``n`` phases (cycles, [0, 1)) from ``density``, exactly.

        Each phase is unpulsed (uniform) with probability ``unpulsed_fraction``;
        otherwise it comes from a peak chosen by relative amplitude (drawn with
        ``rng.vonmises`` or ``rng.normal`` and wrapped), or from a bin chosen by the
        pulsed profile and placed uniformly in it.

        Parameters
        ----------
        n : int
            Number of phases.
        rng : numpy.random.Generator
            Source of randomness.
        """
        n = int(n)
        out = rng.random(n)  # uniform background, overwritten for pulsed events
        pulsed = np.flatnonzero(rng.random(n) >= self.unpulsed_fraction)
        if pulsed.size == 0:
            return out
        if self.components is not None:
            areas = np.array([c.amplitude for c in self.components], dtype=float)
            which = rng.choice(areas.size, size=pulsed.size, p=areas / areas.sum())
            for j, c in enumerate(self.components):
                idx = pulsed[which == j]
                out[idx] = c.sample(idx.size, rng)
        else:
            values = self._pulsed_bins()
            nb = values.size
            bins = rng.choice(nb, size=pulsed.size, p=values / values.sum())
            out[pulsed] = (bins + rng.random(pulsed.size)) / nb
        return np.remainder(out, 1.0)

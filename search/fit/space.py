"""The parameter space of one search: the channel grid, the family coordinates and the bounds.

Units: Hz for centres and widths, s for time spreads, Hz/s for chirp rates, s·Hz for cell
areas of the grid. Per-channel parameter tuples are ``(centers, sigma, area, beta)``, each
``(C,)``.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from burstlens.search.criteria import channel_widths_hz
from burstlens.search.filterbank import center_grid

Q_BOUNDS = (-1.0, 0.5)          # exponent q of the family σ_t(f) = σ_ref·(f/f_ref)^q


@dataclass(frozen=True)
class SearchSpace:
    """Channel grid and bounds of one search (units: Hz, s, Hz/s).

    ``centers_hz`` (C,); ``sigma_bounds_s`` [4/fs, window/6]; ``area_bounds`` cell-area bounds;
    ``beta_bound`` |β| limit (0 when chirps are off); ``f_ref_hz`` the reference frequency of the
    family (geometric mean of the band for log spacing, arithmetic for linear); ``widths_hz``
    (C,) each channel's frequency cell Δf_c (``search.criteria.channel_widths_hz``).

    The grid must sample every kernel the search visits: a channel's image is never narrower
    in frequency than its kernel's conditional spread a/(4π σ_t), so σ_t is capped per channel
    at a/(4π Δf_c) (:meth:`grid_cap_s`). A longer kernel would fall between channel centres,
    lose off-channel energy and be rewarded for it; the cap is where more channels would help.
    """

    fs: float
    centers_hz: np.ndarray
    f_ref_hz: float
    sigma_bounds_s: tuple
    area_bounds: tuple
    beta_bound: float
    widths_hz: np.ndarray

    @classmethod
    def from_settings(cls, s: dict) -> SearchSpace:
        """The space of resolved search settings (``search.settings.resolve_search_options``)."""
        lo, hi = s["band_hz"]
        centers = np.asarray(center_grid(s["band_hz"], s["channels"], s["spacing"]), dtype=np.float64)
        f_ref = math.sqrt(lo * hi) if s["spacing"] == "log" else 0.5 * (lo + hi)
        return cls(fs=s["sampling_rate_hz"], centers_hz=centers, f_ref_hz=f_ref,
                   sigma_bounds_s=tuple(s["time_spread_bounds_s"]),
                   area_bounds=tuple(s["cell_area"]), beta_bound=s["chirp_bound_hz_per_s"],
                   widths_hz=channel_widths_hz(centers))

    @property
    def cell(self) -> np.ndarray:
        """(C,) cell areas Δf_c/fs (s·Hz) of the channel rows."""
        return self.widths_hz / self.fs

    def grid_cap_s(self, area) -> np.ndarray:
        """(C,) longest time spread (s) each channel's grid spacing samples at cell area ``area``."""
        return np.asarray(area, dtype=np.float64) / (4.0 * math.pi * self.widths_hz)

    def clip_sigma(self, sigma, area) -> np.ndarray:
        """σ_t clipped into its bounds, then to the grid cap (the cap wins: an unsampled kernel
        would make the score wrong, a short one only makes it worse)."""
        sigma = np.clip(np.asarray(sigma, dtype=np.float64), *self.sigma_bounds_s)
        return np.minimum(sigma, self.grid_cap_s(area))

    @property
    def dims(self) -> tuple:
        dims = ["log_sigma_ref", "q"]
        if self.area_bounds[1] > self.area_bounds[0]:
            dims.append("log_cell_area")
        if self.beta_bound > 0:
            dims.append("chirp_hz_per_s")
        return tuple(dims)

    def bounds(self, dim: str) -> tuple:
        return {"log_sigma_ref": (math.log(self.sigma_bounds_s[0]), math.log(self.sigma_bounds_s[1])),
                "q": Q_BOUNDS,
                "log_cell_area": (math.log(self.area_bounds[0]), math.log(self.area_bounds[1])),
                "chirp_hz_per_s": (-self.beta_bound, self.beta_bound)}[dim]

    def skopt_dimensions(self):
        # scikit-optimize (and scikit-learn under it) loads only when a family search starts
        from skopt.space import Real

        return [Real(*self.bounds(d), name=d) for d in self.dims]

    def point(self, sigma_ref: float, q: float = 0.0, area: float = 1.0, beta: float = 0.0) -> list:
        """Family coordinates of (σ_ref, q, a0, β0), clipped into the bounds, in ``dims`` order."""
        values = {"log_sigma_ref": math.log(sigma_ref), "q": q, "log_cell_area": math.log(area),
                  "chirp_hz_per_s": beta}
        return [float(np.clip(values[d], *self.bounds(d))) for d in self.dims]

    def family(self, x) -> tuple:
        """Per-channel (centers, sigma, area, beta) arrays of the family point ``x``."""
        v = dict(zip(self.dims, (float(t) for t in x), strict=True))
        f = self.centers_hz
        area = np.full(f.shape, math.exp(v["log_cell_area"]) if "log_cell_area" in v else self.area_bounds[0])
        sigma = self.clip_sigma(np.exp(v["log_sigma_ref"]) * (f / self.f_ref_hz) ** v["q"], area)
        beta = np.full(f.shape, v.get("chirp_hz_per_s", 0.0))
        return (f, sigma, area, beta)

    def describe(self, x) -> dict:
        v = dict(zip(self.dims, (float(t) for t in x), strict=True))
        out = {"time_spread_ref_s": math.exp(v["log_sigma_ref"]), "q": v["q"],
               "cell_area": math.exp(v["log_cell_area"]) if "log_cell_area" in v else self.area_bounds[0],
               "chirp_hz_per_s": v.get("chirp_hz_per_s", 0.0)}
        return out

    def constant(self, sigma: float, area: float = 1.0, beta: float = 0.0) -> tuple:
        """One time spread for every channel (clipped to the grid cap where it binds)."""
        f = self.centers_hz
        area = np.full(f.shape, area)
        return (f, np.minimum(np.full(f.shape, sigma), self.grid_cap_s(area)), area,
                np.full(f.shape, beta))

    def spectrogram_in_space(self) -> bool:
        return self.area_bounds[0] <= 1.0 <= self.area_bounds[1]

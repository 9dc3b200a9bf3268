"""The simulator's priors, written down in one table.

Every random quantity the simulator draws is a row of :data:`PRIORS`: its name, the distribution,
its range, the unit and why it was chosen. The model card and ``docs/simulator.md`` are generated
from this table, so the assumptions a model was trained under are always stated with it.

Distributions
-------------
``uniform``      U(low, high)
``loguniform``   log-uniform on [low, high] (scale-free quantities: periods, depths, noise)
``choice``       one of ``options`` with probabilities ``weights``
``integers``     a whole number in [low, high], uniform
``bernoulli``    True with probability ``low``

Derived quantities (a/R* from Kepler's third law, the main-sequence radius, the third light of a
diluted binary) are computed in :mod:`training.simulate` from these draws and listed there.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from features.errors import ParameterError

__all__ = ["PRIORS", "Prior", "PriorTable", "default_priors", "priors_markdown"]


@dataclass(frozen=True, slots=True)
class Prior:
    """One row of the prior table.

    Parameters
    ----------
    name : str
        Dotted name ``group.quantity``, e.g. ``"planet.k"``.
    distribution : str
        One of ``uniform``, ``loguniform``, ``choice``, ``integers``, ``bernoulli``.
    low, high : float
        Range (for ``bernoulli`` ``low`` is the probability; unused for ``choice``).
    unit : str
        Physical unit of the draw (``""`` for dimensionless).
    why : str
        The reason for this choice, with its source where there is one.
    options, weights : tuple
        For ``choice`` only: the values and their probabilities.
    """

    name: str
    distribution: str
    low: float = 0.0
    high: float = 0.0
    unit: str = ""
    why: str = ""
    options: tuple[Any, ...] = field(default=())
    weights: tuple[float, ...] = field(default=())

    def sample(self, rng: np.random.Generator) -> Any:
        """Draw one value with ``rng``."""
        d = self.distribution
        if d == "uniform":
            return float(rng.uniform(self.low, self.high))
        if d == "loguniform":
            return float(np.exp(rng.uniform(np.log(self.low), np.log(self.high))))
        if d == "integers":
            return int(rng.integers(int(self.low), int(self.high) + 1))
        if d == "bernoulli":
            return bool(rng.random() < self.low)
        # choice
        idx = int(rng.choice(len(self.options), p=self.weights))
        return self.options[idx]

    def describe(self) -> str:
        """Return the distribution as a short human string, e.g. ``logU(0.5, 50)``."""
        d = self.distribution
        if d == "uniform":
            return f"U({self.low:g}, {self.high:g})"
        if d == "loguniform":
            return f"logU({self.low:g}, {self.high:g})"
        if d == "integers":
            return f"integer in [{int(self.low)}, {int(self.high)}]"
        if d == "bernoulli":
            return f"True with p = {self.low:g}"
        pairs = ", ".join(f"{o}: {w:g}" for o, w in zip(self.options, self.weights, strict=True))
        return f"choice({pairs})"


_DISTRIBUTIONS = ("uniform", "loguniform", "choice", "integers", "bernoulli")


def _validate(prior: Prior) -> None:
    if prior.distribution not in _DISTRIBUTIONS:
        raise ParameterError(
            "invalid_prior", f"prior {prior.name!r}: unknown distribution {prior.distribution!r}"
        )
    if prior.distribution == "choice":
        if not prior.options or len(prior.options) != len(prior.weights):
            raise ParameterError(
                "invalid_prior", f"prior {prior.name!r}: options and weights must match"
            )
        if abs(sum(prior.weights) - 1.0) > 1e-9 or min(prior.weights) < 0:
            raise ParameterError(
                "invalid_prior", f"prior {prior.name!r}: weights must be >= 0 and sum to 1"
            )
    elif prior.distribution == "bernoulli":
        if not 0.0 <= prior.low <= 1.0:
            raise ParameterError("invalid_prior", f"prior {prior.name!r}: p must be in [0, 1]")
    elif not prior.low < prior.high and prior.distribution != "integers":
        raise ParameterError("invalid_prior", f"prior {prior.name!r}: needs low < high")
    elif prior.distribution == "loguniform" and prior.low <= 0:
        raise ParameterError("invalid_prior", f"prior {prior.name!r}: loguniform needs low > 0")


class PriorTable(Mapping[str, Prior]):
    """An immutable, validated mapping ``name -> Prior`` with a ``draw`` helper.

    Parameters
    ----------
    rows : sequence of Prior
        The rows; names must be unique.
    """

    def __init__(self, rows: Sequence[Prior]) -> None:
        table: dict[str, Prior] = {}
        for row in rows:
            _validate(row)
            if row.name in table:
                raise ParameterError("invalid_prior", f"duplicate prior {row.name!r}")
            table[row.name] = row
        self._rows = table

    def __getitem__(self, name: str) -> Prior:
        try:
            return self._rows[name]
        except KeyError:
            raise ParameterError("invalid_prior", f"no prior named {name!r}") from None

    def __iter__(self):
        return iter(self._rows)

    def __len__(self) -> int:
        return len(self._rows)

    def draw(self, name: str, rng: np.random.Generator) -> Any:
        """Draw the prior ``name`` with ``rng``."""
        return self[name].sample(rng)

    def replace(self, **changes: Prior) -> PriorTable:
        """Return a new table with rows replaced (keyword: the prior name, ``__`` for ``.``)."""
        rows = dict(self._rows)
        for key, row in changes.items():
            rows[key.replace("__", ".")] = row
        return PriorTable(list(rows.values()))

    def as_records(self) -> list[dict[str, Any]]:
        """Rows as plain dicts (for the model card and docs)."""
        return [
            {
                "name": p.name,
                "distribution": p.describe(),
                "unit": p.unit,
                "why": p.why,
            }
            for p in self._rows.values()
        ]


_LD_WHY = (
    "quadratic limb darkening of FGK dwarfs in optical/red bands spans roughly this range "
    "(Claret 2011 tables; range from memory)"
)

_ROWS: tuple[Prior, ...] = (
    # --- observing conditions -------------------------------------------------------------
    Prior("obs.t_start_days", "uniform", 1000.0, 2000.0, "d",
          "arbitrary time origin of the fictional survey (segments start anywhere in it)"),
    Prior("obs.flux_level", "loguniform", 1e2, 1e5, "e-/s",
          "arbitrary flux scale: readers must normalise whatever they are given"),
    Prior("obs.cadence_min", "choice", unit="min", options=(2.0, 10.0, 30.0),
          weights=(0.4, 0.3, 0.3),
          why="the cadences of current space surveys' short, full-frame and long products"),
    Prior("obs.window", "choice", options=("single", "multi", "sector"),
          weights=(0.35, 0.2, 0.45),
          why="from single-event cut-outs (alert streams) to whole 27-day sectors"),
    Prior("obs.single_days", "uniform", 1.5, 4.0, "d",
          "a cut-out around one event, long enough for the baseline on both sides"),
    Prior("obs.multi_days", "uniform", 5.0, 13.0, "d", "half a sector, one orbit of a survey"),
    Prior("obs.sector_days", "uniform", 25.0, 28.0, "d",
          "a 27-day sector; split by a mid-sector gap for data download (common practice)"),
    Prior("obs.gap_days", "uniform", 0.5, 1.5, "d", "the mid-sector gap (common practice)"),
    Prior("obs.white_ppm", "loguniform", 50.0, 3000.0, "ppm",
          "per-point white noise from bright stars at long cadence to faint ones at short"),
    Prior("obs.red_fraction", "loguniform", 0.02, 1.0, "",
          "correlated-noise amplitude relative to the white noise per point"),
    Prior("obs.red_timescale_days", "loguniform", 0.02, 0.5, "d",
          "correlation time of instrumental/granulation red noise"),
    Prior("obs.nan_fraction", "uniform", 0.0, 0.02, "", "random missing cadences"),
    Prior("obs.has_rotation", "bernoulli", 0.5, why="half of FGK stars show spot modulation"),
    Prior("obs.rotation_days", "loguniform", 6.0, 30.0, "d",
          "background rotation slower than any dip considered, so detrending can follow it"),
    Prior("obs.rotation_amp", "loguniform", 1e-4, 3e-3, "",
          "background spot modulation amplitude of quiet to moderately active dwarfs"),
    Prior("obs.has_flux_err", "bernoulli", 0.85,
          why="most products ship errors; some exports do not"),
    # --- host star --------------------------------------------------------------------------
    Prior("star.mass_msun", "uniform", 0.6, 1.4, "M_sun", "FGK main-sequence hosts"),
    Prior("star.radius_scatter_dex", "uniform", -0.08, 0.08, "dex",
          "scatter about the main-sequence relation R = M^0.8 (common practice)"),
    Prior("star.u1", "uniform", 0.25, 0.6, "", _LD_WHY),
    Prior("star.u2", "uniform", 0.05, 0.35, "", _LD_WHY),
    # --- planet -----------------------------------------------------------------------------
    Prior("planet.period_days", "loguniform", 0.5, 40.0, "d",
          "ultra-short to warm planets; occurrence is roughly flat in log P (common practice)"),
    Prior("planet.k", "loguniform", 0.02, 0.2, "",
          "Rp/R* from sub-Neptunes around Sun-like stars to Jupiters around K dwarfs"),
    Prior("planet.b", "uniform", 0.0, 1.0, "",
          "isotropic orbits give uniform impact parameter; b > 1 - k grazes"),
    Prior("planet.is_eccentric", "bernoulli", 0.2, why="most short-period planets are circular"),
    Prior("planet.ecc", "uniform", 0.0, 0.3, "", "moderate eccentricities of warm planets"),
    Prior("planet.omega_deg", "uniform", 0.0, 360.0, "deg", "argument of periastron, isotropic"),
    # --- eclipsing binary -------------------------------------------------------------------
    Prior("eb.subtype", "choice",
          options=("detached", "diluted", "grazing", "eccentric", "low_mass_companion"),
          weights=(0.25, 0.3, 0.2, 0.15, 0.1),
          why="the planet-like cases (diluted, grazing, M-dwarf companions) are over-weighted "
              "because they are the hard ones"),
    Prior("eb.period_days", "loguniform", 0.4, 20.0, "d", "close to wide detached binaries"),
    Prior("eb.mass_ratio", "uniform", 0.3, 1.0, "", "main-sequence companions"),
    Prior("eb.low_mass_ratio", "uniform", 0.1, 0.3, "",
          "M-dwarf companions of FGK stars: planet-like radius ratios, faint secondary"),
    Prior("eb.sbr_scatter_dex", "uniform", -0.15, 0.15, "dex",
          "scatter about the surface-brightness ratio q^2.4 of main-sequence pairs"),
    Prior("eb.b", "uniform", 0.0, 0.85, "", "non-grazing detached systems"),
    Prior("eb.grazing_overlap", "uniform", 0.1, 0.8, "",
          "grazing: fraction of the companion's diameter that overlaps the primary's limb"),
    Prior("eb.diluted_depth", "loguniform", 0.002, 0.015, "",
          "target primary depth after third light: the planet-like 0.2-1.5 % range"),
    Prior("eb.ecc", "uniform", 0.05, 0.4, "", "eccentric detached binaries"),
    Prior("eb.omega_deg", "uniform", 0.0, 360.0, "deg", "argument of periastron, isotropic"),
    Prior("eb.gravity_darkening", "uniform", 0.3, 0.5, "",
          "gravity-darkening coefficient of convective/radiative envelopes (from memory)"),
    Prior("eb.albedo", "uniform", 0.3, 0.7, "", "bolometric albedo of the companion (approx.)"),
    # --- exocomet ---------------------------------------------------------------------------
    Prior("comet.n_events", "choice", options=(1, 2, 3), weights=(0.5, 0.3, 0.2),
          why="comet dips are rare and not periodic: 1-3 per segment"),
    Prior("comet.depth", "loguniform", 4e-4, 5e-3, "",
          "the exocomet dips seen so far are about 0.05-0.3 % deep (common practice), "
          "extended a little on both sides"),
    Prior("comet.crossing_days", "loguniform", 0.1, 0.8, "d",
          "the head (and the steep ingress) crosses the chord in hours"),
    Prior("comet.tail_rstar", "loguniform", 1.0, 6.0, "R_*",
          "exponential tail scale length of the dust, long enough that the shallow egress "
          "outlasts the ingress and the dip lasts of order a day (exponential-tail fits: "
          "Brogi et al. 2012; Kennedy et al. 2019)"),
    Prior("comet.b", "uniform", 0.0, 0.9, "", "impact parameter of the chord"),
    Prior("comet.height_rstar", "uniform", 0.1, 0.5, "R_*",
          "vertical extent of the dust strip across the chord"),
    # --- stellar variability ----------------------------------------------------------------
    Prior("var.subtype", "choice", options=("spots", "pulsation", "stochastic"),
          weights=(0.4, 0.3, 0.3), why="rotation, coherent pulsation, granulation-like noise"),
    Prior("var.spot_period_days", "loguniform", 0.3, 10.0, "d",
          "fast rotators whose spot dips resemble transits in width"),
    Prior("var.spot_amp", "loguniform", 1e-3, 3e-2, "", "active-star spot amplitudes"),
    Prior("var.n_harmonics", "integers", 1, 3, why="non-sinusoidal spot profiles"),
    Prior("var.spot_decay_days", "loguniform", 3.0, 60.0, "d", "spot evolution time"),
    Prior("var.n_modes", "integers", 1, 6, why="a few excited pulsation modes"),
    Prior("var.mode_freq_per_day", "loguniform", 1.0, 50.0, "1/d",
          "gamma Dor to delta Scuti frequencies"),
    Prior("var.mode_amp", "loguniform", 2e-4, 5e-3, "", "mode amplitudes"),
    Prior("var.stochastic_amp", "loguniform", 3e-4, 5e-3, "", "granulation-like amplitude"),
    Prior("var.stochastic_days", "loguniform", 0.05, 1.0, "d", "its correlation time"),
    # --- instrument artefacts ---------------------------------------------------------------
    Prior("sys.subtype", "choice",
          options=("cadence_dip", "ramp", "step", "outliers", "scattered_light", "pointing_dip"),
          weights=(0.2, 0.2, 0.15, 0.15, 0.15, 0.15),
          why="the common artefacts of space photometry (common practice)"),
    Prior("sys.n_artefacts", "integers", 1, 3, why="artefacts often come together"),
    Prior("sys.cadences", "integers", 1, 3, why="one-to-three-cadence dips (cosmic rays, jumps)"),
    Prior("sys.depth", "loguniform", 5e-4, 2e-2, "", "artefact amplitude"),
    Prior("sys.ramp_days", "loguniform", 0.05, 1.0, "d", "thermal settling after a gap"),
    Prior("sys.hump_days", "loguniform", 0.2, 2.0, "d", "scattered-light hump width"),
    Prior("sys.box_days", "loguniform", 0.03, 0.5, "d", "pointing excursion length"),
    Prior("sys.n_outliers", "integers", 1, 8, why="single-cadence outliers"),
)

PRIORS: PriorTable = PriorTable(_ROWS)
"""The default prior table (immutable)."""


def default_priors() -> PriorTable:
    """Return the default prior table."""
    return PRIORS


def priors_markdown(table: PriorTable | None = None) -> str:
    """Render the prior table as a Markdown table."""
    table = table or PRIORS
    lines = ["| parameter | distribution | unit | why |", "|---|---|---|---|"]
    for rec in table.as_records():
        lines.append(f"| `{rec['name']}` | {rec['distribution']} | {rec['unit']} | {rec['why']} |")
    return "\n".join(lines) + "\n"

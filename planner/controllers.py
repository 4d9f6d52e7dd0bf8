"""Weight controllers: the policy that picks the search weight before each decision step.

A controller follows :class:`Controller`: ``reset(seed)`` returns the first weight, then
``decide(features, stats)`` returns the weight for the next step. ``mode`` tells the session how
to order the open list: ``"weighted"`` (key ``g + w*h``) or ``"ana"`` (ANA* key; the weight is
then only recorded). The learned controller (``policies.runtime``) follows the same protocol.

Built-in controllers (:func:`make_controller` specs):

==============  ==================================================================================
spec            behaviour
==============  ==================================================================================
``fixed:W``     weight ``W`` at every step (``W`` in ``MIN_WEIGHT..MAX_WEIGHT``, 1..5)
``random``      seeded random walk over :data:`WEIGHTS`: starts at a uniformly drawn weight, then
                each step moves one place down, stays, or moves one place up (equal chances,
                clipped at the ends) -- the random-adjustment baseline
``decreasing``  ARA*-style schedule: starts at the largest weight (5); after a step with ``k``
                new routes it moves ``k`` places down :data:`WEIGHTS`; after
                :data:`DECREASING_PATIENCE` steps in a row without a new route (once a route
                exists) it also moves one place down, so a stalled search still tightens
``ana``         ANA* (van den Berg et al. 2011): the kernel expands by ``-(G - g) / h``, greedy on
                ``h`` before the first route; no weight to tune. The weight it reports is the
                suboptimality bound it has proven, ``min(5, cost / lower bound)`` (5 before the
                first route), so features stay comparable
==============  ==================================================================================
"""

from __future__ import annotations

import math
from typing import Protocol, runtime_checkable

import numpy as np

from dueroute.planner.errors import InvalidRequest
from dueroute.planner.limits import MAX_WEIGHT, MIN_WEIGHT, WEIGHTS, controller_spec_help
from dueroute.planner.results import SearchStats

#: Steps without a new route after which ``decreasing`` lowers the weight anyway.
DECREASING_PATIENCE = 2

#: The specs :func:`make_controller` builds (``learned`` is built by ``dueroute.policies``).
SPECS = ("fixed:W", "random", "decreasing", "ana")


@runtime_checkable
class Controller(Protocol):
    """Picks the weight for each decision step of a search."""

    name: str
    mode: str  # "weighted" (key g + w*h) or "ana" (ANA* key)

    def reset(self, seed: int | None) -> float:
        """Start a new search; return the initial weight (>= 1)."""
        ...

    def decide(self, features: np.ndarray, stats: SearchStats) -> float:
        """Return the weight for the next step (>= 1) from the features and the raw stats.

        A controller may declare ``uses_features = False`` (it reads ``stats`` only; it then
        gets an empty array) and ``constant = True`` (its weight never changes; ``plan()``
        then runs one step and never asks)."""
        ...


class FixedController:
    """The same weight at every step."""

    mode = "weighted"
    #: The weight never changes: ``plan()`` runs the search as one step, with no decisions.
    constant = True
    uses_features = False

    def __init__(self, weight: float) -> None:
        if not (math.isfinite(weight) and MIN_WEIGHT <= weight <= MAX_WEIGHT):
            raise InvalidRequest(
                f"fixed weight must be a number in {MIN_WEIGHT:g}..{MAX_WEIGHT:g}, got {weight!r}"
            )
        self.weight = float(weight)
        self.name = f"fixed:{_fmt(self.weight)}"

    def reset(self, seed: int | None) -> float:
        return self.weight

    def decide(self, features: np.ndarray, stats: SearchStats) -> float:
        return self.weight


class RandomWalkController:
    """Seeded random walk over :data:`WEIGHTS` (one place down / stay / up per step)."""

    name = "random"
    mode = "weighted"
    uses_features = False  #: ``plan()`` skips computing features it would not read

    def __init__(self, seed: int | None = None) -> None:
        self._default_seed = seed
        self._rng = np.random.default_rng(seed)
        self._i = len(WEIGHTS) - 1

    def reset(self, seed: int | None) -> float:
        self._rng = np.random.default_rng(self._default_seed if seed is None else seed)
        self._i = int(self._rng.integers(len(WEIGHTS)))
        return WEIGHTS[self._i]

    def decide(self, features: np.ndarray, stats: SearchStats) -> float:
        move = int(self._rng.integers(-1, 2))
        self._i = min(max(self._i + move, 0), len(WEIGHTS) - 1)
        return WEIGHTS[self._i]


class DecreasingController:
    """ARA*-style: start at the largest weight and step down as routes are found."""

    name = "decreasing"
    mode = "weighted"
    uses_features = False  #: reads the stats only

    def __init__(self, patience: int = DECREASING_PATIENCE) -> None:
        self.patience = int(patience)
        self._i = len(WEIGHTS) - 1
        self._seen = 0

    def reset(self, seed: int | None) -> float:
        self._i = len(WEIGHTS) - 1
        self._seen = 0
        return WEIGHTS[self._i]

    def decide(self, features: np.ndarray, stats: SearchStats) -> float:
        new = stats.improvements - self._seen
        self._seen = stats.improvements
        if new > 0:
            self._i = max(0, self._i - new)
        elif (
            stats.incumbent_cost_s is not None
            and stats.steps_since_improvement >= self.patience
            and stats.steps_since_improvement % self.patience == 0
        ):
            self._i = max(0, self._i - 1)
        return WEIGHTS[self._i]


class AnaController:
    """ANA*: the kernel orders by -(G - g)/h; the weight reported is the proven ratio."""

    name = "ana"
    mode = "ana"
    uses_features = False  #: reads the stats only

    def reset(self, seed: int | None) -> float:
        return WEIGHTS[-1]

    def decide(self, features: np.ndarray, stats: SearchStats) -> float:
        cost = stats.incumbent_cost_s
        if cost is None or stats.lower_bound_s <= 0.0:
            return WEIGHTS[-1]
        return float(min(WEIGHTS[-1], max(1.0, cost / stats.lower_bound_s)))


def _fmt(w: float) -> str:
    return f"{w:g}"


def make_controller(spec: str, seed: int | None = None) -> Controller:
    """Build a built-in controller from its spec (see the module docstring).

    Raises :class:`InvalidRequest` for an unknown spec, listing the allowed ones.
    """
    if not isinstance(spec, str):
        raise InvalidRequest(f"controller spec must be a string, got {spec!r}")
    s = spec.strip()
    if s.startswith("fixed:"):
        raw = s[len("fixed:") :]
        try:
            w = float(raw)
        except ValueError:
            raise InvalidRequest(
                f"controller {spec!r}: weight {raw!r} is not a number; use e.g. 'fixed:1.5' "
                f"(a weight in {MIN_WEIGHT:g}..{MAX_WEIGHT:g})"
            ) from None
        return FixedController(w)
    if s == "random":
        return RandomWalkController(seed)
    if s == "decreasing":
        return DecreasingController()
    if s == "ana":
        return AnaController()
    raise InvalidRequest(f"unknown controller {spec!r}; allowed: {controller_spec_help()}")


__all__ = [
    "WEIGHTS",
    "AnaController",
    "Controller",
    "DecreasingController",
    "FixedController",
    "RandomWalkController",
    "make_controller",
]

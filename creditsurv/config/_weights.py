"""Scenario probability weights: one rule, checked once."""

from __future__ import annotations

import math
from collections.abc import Iterator, Mapping, Sequence

from ..errors import ConfigError, problem_list

__all__ = ["WEIGHTED", "WEIGHT_TOLERANCE", "ScenarioWeights", "weight_problems"]

WEIGHTED = "weighted"
"""Name of the probability-weighted scenario in every output table (reserved: no scenario may use it)."""

WEIGHT_TOLERANCE = 1e-9
"""How far the scenario weights' sum may be from 1 (rounding of decimal weights)."""


def weight_problems(weights: Mapping[str, object], label: str = "scenarios") -> list[str]:
    """Every problem of a set of scenario probability weights, each prefixed with ``label``.

    The one rule for weights, wherever they come from (the config, a library
    call, a prior run's record): at least one scenario, none named
    ``weighted`` (reserved for the probability-weighted result), each a finite
    number >= 0, summing to 1 within ``WEIGHT_TOLERANCE``.
    """
    if not weights:
        return [f"{label}: no scenario weights given"]
    problems = []
    if WEIGHTED in weights:
        problems.append(f"{label}: the name {WEIGHTED!r} is reserved for the probability-weighted result")
    values = {}
    for name, w in weights.items():
        try:
            values[name] = float(w)
        except (TypeError, ValueError):
            values[name] = math.nan
    bad = {name: weights[name] for name, w in values.items() if not (math.isfinite(w) and w >= 0)}
    if bad:
        problems.append(f"{label}: scenario weights must be finite numbers >= 0, got {bad}")
    elif abs(sum(values.values()) - 1.0) > WEIGHT_TOLERANCE:
        text = ", ".join(f"{name}={w:g}" for name, w in values.items())
        problems.append(f"{label}: scenario weights must sum to 1, got {sum(values.values()):.10g} ({text})")
    return problems


class ScenarioWeights(Mapping[str, float]):
    """Scenario name to probability weight, checked once when built (see :func:`weight_problems`).

    The stages take weights of this type and do not check them again; a plain
    mapping given to a stage by a library caller is turned into one, and so
    checked, at that stage's entry.

    Raises
    ------
    ConfigError
        Listing every problem of the weights.
    """

    __slots__ = ("_weights",)

    def __init__(self, weights: Mapping[str, object], label: str = "scenarios"):
        problems = weight_problems(weights, label)
        if problems:
            raise ConfigError(problem_list(problems, "the scenario weights"))
        self._weights = {str(name): float(w) for name, w in weights.items()}

    def __getitem__(self, name: str) -> float:
        return self._weights[name]

    def __iter__(self) -> Iterator[str]:
        return iter(self._weights)

    def __len__(self) -> int:
        return len(self._weights)

    def __repr__(self) -> str:
        return f"ScenarioWeights({self._weights!r})"

    def __reduce__(self):
        # Sent to engine workers as plain data (checked again there: cheap).
        return (ScenarioWeights, (dict(self._weights),))

    def in_order(self, names: Sequence[str]) -> ScenarioWeights:
        """The same weights in the order of ``names``, which must be exactly these scenarios.

        Raises
        ------
        ConfigError
            ``names`` lacks a weighted scenario or has one without a weight.
        """
        missing = [s for s in names if s not in self._weights]
        extra = [s for s in self._weights if s not in names]
        if missing or extra:
            raise ConfigError(f"scenario weights: no weight for {missing}; weights for scenarios not given {extra}")
        ordered = ScenarioWeights.__new__(ScenarioWeights)
        ordered._weights = {s: self._weights[s] for s in names}
        return ordered

"""The run context: what every stage of a run needs from the config, derived and checked once."""

from __future__ import annotations

from dataclasses import dataclass

from ..errors import ConfigError
from ._config import Config
from ._weights import ScenarioWeights

__all__ = ["RunContext", "run_context"]

@dataclass(frozen=True)
class RunContext:
    """A run's config with the values every stage derives from it, checked once.

    Attributes
    ----------
    cfg : Config
    as_of : int
        The reporting month as a month index (``year * 12 + month - 1``).
    weights : ScenarioWeights
        Scenario name to probability weight, in config order; non-negative,
        summing to 1 (checked when the config was read).
    engine : str
        ``"duckdb"`` or ``"spark"``.
    """

    cfg: Config
    as_of: int
    weights: ScenarioWeights
    engine: str

    @property
    def scenarios(self) -> tuple[str, ...]:
        return tuple(self.weights)

    def horizon_end(self, max_remaining_term: int) -> int:
        """Last month index a projection of the book reads: the longest remaining term plus the recovery lag."""
        return self.as_of + int(max_remaining_term) + self.cfg.loss.lgd.months_to_recovery + 1

    def ecl_options(self) -> dict:
        """The settings of :func:`creditsurv.loss.expected_credit_loss` that the config gives."""
        cfg = self.cfg
        return {
            "as_of_idx": self.as_of,
            "weights": self.weights,
            "loss": cfg.loss,
            "staging": cfg.staging,
            "default_days_past_due": cfg.default_definition.days_past_due,
            "collateral": cfg.collateral,
            "band_column": cfg.segments.band_column,
            "band_edges": cfg.segments.band_edges,
            "extension": cfg.scenario_extension,
            "accounting": cfg.accounting,
        }


def run_context(cfg: Config) -> RunContext:
    """The run context of ``cfg``.

    The weights were checked when the config was read; they are wrapped here
    in :class:`ScenarioWeights`, which every stage then trusts.

    Raises
    ------
    ConfigError
        The config names no scenario (a run projects under at least one; the
        fit alone does not need any).
    """
    if not cfg.scenarios:
        raise ConfigError("scenarios: a run needs at least one scenario (name, weight, path)")
    weights = ScenarioWeights({s.name: s.weight for s in cfg.scenarios})
    return RunContext(cfg=cfg, as_of=int(cfg.as_of), weights=weights, engine=cfg.engine)

"""Survival models: boosted trees, bagged trees / forests, and the Cox baseline."""

from wearcast.models.base import SurvivalModel, conditional_failure_probability

__all__ = ["SurvivalModel", "conditional_failure_probability"]

"""The cautions every output carries (README, report, maps, CLI)."""

from __future__ import annotations

__all__ = ["CAUTIONS", "CAUTION_LINE"]

CAUTIONS: tuple[str, ...] = (
    "altigrade is a planning aid, not a fuel recommendation for any vehicle.",
    "Follow the vehicle maker's fuel recommendation (owner's manual, fuel-filler label) "
    "whatever these results say; engine damage from knock is real.",
    "Local fuel regulations and licensed practice take precedence: the rule sets shipped with "
    "altigrade are examples, not any jurisdiction's law.",
    "Results come from a standard-atmosphere design day and a fleet model with stated "
    "uncertainty; real weather, vehicles and fuels vary.",
)

CAUTION_LINE = (
    "A planning aid: follow the vehicle maker's fuel recommendation; local fuel "
    "regulations and licensed practice take precedence."
)

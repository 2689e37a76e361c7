"""altigrade: station elevation, barometric pressure and justified minimum gasoline AKI.

A planning aid. Vehicle makers' fuel recommendations, local fuel regulations and licensed
practice take precedence over anything this package computes.
"""

from __future__ import annotations

__version__ = "0.1.0"

__all__ = ["__version__"]

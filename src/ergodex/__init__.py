"""ergodex: fit cheap surrogate dynamics and accept them only when their long-run statistics match the data's."""

from __future__ import annotations

__version__ = "0.1.0"

__all__ = ["__version__"]

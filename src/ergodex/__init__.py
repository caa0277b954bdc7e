"""ergodex: fit cheap surrogate dynamics and accept them only when their long-run statistics
match the data's."""

from __future__ import annotations

__version__ = "0.1.0"

#: The caution every report, summary and export carries: surrogates can feed decisions that hurt
#: people, and a statistical check is evidence, not a licence.
CAUTION = (
    "A passed statistical check is not a certification: it shows only that the surrogate's "
    "long-run statistics matched the reference data within that data's own sampling noise, for "
    "the statistics checked. Before a surrogate informs decisions that can hurt people (flood, "
    "heat, structural loads), defer to the applicable codes, standards and licensed practice."
)

__all__ = ["CAUTION", "__version__", "as_series", "simulate"]

# The Python API, loaded on first use so that ``import ergodex`` stays cheap.
_LAZY = {"as_series": "ergodex.frames", "simulate": "ergodex.simulation"}


def __getattr__(name: str):
    if name in _LAZY:
        import importlib

        return getattr(importlib.import_module(_LAZY[name]), name)
    raise AttributeError(f"module 'ergodex' has no attribute {name!r}")

"""ergodex: fit cheap surrogate dynamics and accept them only when their long-run statistics match the data's."""

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

__all__ = ["CAUTION", "__version__"]

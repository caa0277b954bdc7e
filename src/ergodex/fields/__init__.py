"""Gridded fields: CF NetCDF variables on a latitude–longitude grid, reduced to a few modes.

One job per module: :mod:`~ergodex.fields.calendar` (model calendars and the sampling clock),
:mod:`~ergodex.fields.reading` (CF files → :class:`Field`), :mod:`~ergodex.fields.preparing`
(seasonal cycle, trend), :mod:`~ergodex.fields.reducing` (area-weighted EOFs, mode count),
:mod:`~ergodex.fields.transform` (the ``field-modes`` transform stored in the model file).
"""

from ergodex.fields.calendar import Clock
from ergodex.fields.reading import Box, Field, parse_box, read_field
from ergodex.fields.transform import FieldModes, modes_series

__all__ = ["Box", "Clock", "Field", "FieldModes", "modes_series", "parse_box", "read_field"]

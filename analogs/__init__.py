"""analogs: what did days like this do?

Pattern analogs of 500 hPa geopotential height and low-level moisture from a
gridded archive, with the weather regime of each day and the severe-weather
outcome statistics tied to the analogs.

Guidance only: this is not a forecast or a warning. Always defer to the
official national weather service and local emergency management.
"""

__version__ = "0.1.0"

CAUTION = (
    "Guidance only: analog statistics are not a forecast or a warning. "
    "For decisions, defer to the official national weather service and "
    "local emergency management."
)

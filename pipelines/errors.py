"""Errors a planner can act on: each says what was wrong, where, and what to do."""


class PlanningError(Exception):
    """Base class for every error apportion raises on bad input or config."""


class ConfigError(PlanningError):
    """The planning config is invalid, or does not fit the data it is run on."""


class InputFileError(PlanningError):
    """An input file is missing, unreadable, or lacks required columns."""


class LifecycleError(PlanningError):
    """The lifecycle master data contradict themselves (e.g. a successor cycle)."""


class UnknownKeyError(PlanningError):
    """A product, site, customer or period asked about is not in the stored cycle."""


class PinError(PlanningError):
    """Pins take more than their parent holds, with `pins.on_overflow: error`."""

"""mapper: from a campaign of open-loop step tests to FOPDT models, an operating map and a
single-controller-or-gain-schedule verdict."""

__version__ = "0.1.0"

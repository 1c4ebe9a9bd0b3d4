"""curvekeeper: an online calibration service for sensor fleets."""

__version__ = "0.1.0"

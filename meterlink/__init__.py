"""meterlink: host companion for an RF field-strength meter.

The physics core (units, calibration, limits, averaging, verdicts) is pure and importable
on its own; the serial link, storage, CLI and reports sit at the edges.
"""

__version__ = "0.1.0"

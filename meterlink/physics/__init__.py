"""The pure physics core: units, interpolation, uncertainty, calibration maths, reference levels, averaging, exposure sums, verdicts, assessment (no I/O layer imports)."""

"""Calibration-lab checks of a probe: session model, procedures, analysis, budget, certificates."""

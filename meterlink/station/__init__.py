"""The monitoring station daemon: station file, monitor, derived series, spectral sweeps, alarms, stats, publication."""

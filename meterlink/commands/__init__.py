"""Sub-commands of the CLI, one module each (see meterlink.cli)."""

"""The simulated meter: scene physics, instrument models and firmware emulation served on a pty."""

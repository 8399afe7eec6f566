"""The device side: wire protocol, serial transport, the link thread, commands to the meter, device clock, conformance checks."""

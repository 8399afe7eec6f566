"""Allow ``python -m meterlink``."""

from meterlink.cli import main

raise SystemExit(main())

"""meterlink: host companion for an RF field-strength meter.

The physics core (units, calibration, limits, averaging, verdicts) is pure and importable
on its own; the serial link, storage, CLI and reports sit at the edges.
"""

import os
import sys

__version__ = "0.1.0"

# The simulators/ folder installs as meterlink.simulators (pyproject package-dir). Run from a
# checkout (python -m from the repo root puts the checkout's meterlink/ ahead of the installed
# one), that mapping is shadowed: this finder, consulted after the ordinary ones, serves
# meterlink.simulators from the folder beside the package, as certificate.py does for calibration/.
# (os.path, not pathlib, and importlib.util only when asked: every command pays for what this imports)
_CHECKOUT_SIMULATORS = os.path.join(os.path.dirname(os.path.dirname(os.path.realpath(__file__))), "simulators")


class _CheckoutSimulators:
    """Find meterlink.simulators in a checkout's simulators/ folder when nothing else does."""

    @staticmethod
    def find_spec(fullname, path=None, target=None):
        if fullname != "meterlink.simulators":
            return None
        from importlib.util import spec_from_file_location

        init = os.path.join(_CHECKOUT_SIMULATORS, "__init__.py")
        return spec_from_file_location(fullname, init, submodule_search_locations=[_CHECKOUT_SIMULATORS])


if (os.path.isfile(os.path.join(_CHECKOUT_SIMULATORS, "pty_meter.py"))
        and os.path.isfile(os.path.join(os.path.dirname(_CHECKOUT_SIMULATORS), "pyproject.toml"))):
    sys.meta_path.append(_CheckoutSimulators)

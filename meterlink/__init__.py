"""meterlink: host companion for an RF field-strength meter.

The physics core (units, calibration, limits, averaging, verdicts) is pure and importable
on its own; the serial link, storage, CLI and reports sit at the edges.
"""

import sys
from importlib.machinery import ModuleSpec
from importlib.util import spec_from_file_location
from pathlib import Path

__version__ = "0.1.0"

# The simulators/ folder installs as meterlink.simulators (pyproject package-dir). Run from a
# checkout (python -m from the repo root puts the checkout's meterlink/ ahead of the installed
# one), that mapping is shadowed: this finder, consulted after the ordinary ones, serves
# meterlink.simulators from the folder beside the package, as certificate.py does for calibration/.
_CHECKOUT_SIMULATORS = Path(__file__).resolve().parent.parent / "simulators"


class _CheckoutSimulators:
    """Find meterlink.simulators in a checkout's simulators/ folder when nothing else does."""

    @staticmethod
    def find_spec(fullname, path=None, target=None) -> ModuleSpec | None:
        if fullname != "meterlink.simulators":
            return None
        init = _CHECKOUT_SIMULATORS / "__init__.py"
        return spec_from_file_location(fullname, init, submodule_search_locations=[str(_CHECKOUT_SIMULATORS)])


if (_CHECKOUT_SIMULATORS / "pty_meter.py").is_file() and (_CHECKOUT_SIMULATORS.parent / "pyproject.toml").is_file():
    sys.meta_path.append(_CheckoutSimulators)

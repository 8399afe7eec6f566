"""The certificate items of the packaged example lab session (invented), for tests that build a session in code."""

import dataclasses

from conftest import ROOT
from meterlink.lab.session import load_session

EXAMPLE_SESSION = ROOT / "meterlink" / "lab" / "examples" / "session.toml"
EXAMPLE_READINGS = ROOT / "meterlink" / "lab" / "examples" / "readings.csv"

# what a session file adds to a certificate besides probe, lab and dates (docs/lab.md)
ITEMS_TOML = """
[customer]
name = "Customer <i>Ltd</i> (invented)"
address = "1 Test Road, Testtown (invented)"
[signatory]
name = "S. Igner (invented)"
function = "Technical manager"
[[reference]]
name = "power sensor (invented)"
certificate_number = "REF-1"
due = 2029-01-01
"""


def with_certificate_items(session):
    """The session with the example's address, customer, reference standards and signatory."""
    ex = load_session(EXAMPLE_SESSION)
    return dataclasses.replace(session, lab_address=ex.lab_address, customer=ex.customer,
                               references=ex.references, signatory=ex.signatory)

"""The cautions every verdict, report and page carries (also meterlink.cli.SAFETY_LINE).

A leaf module, so that report writers below the CLI can carry them without importing the CLI.
"""

SAFETY_LINE = (
    "Results support, and do not replace, an assessment by a qualified person under local "
    "regulations. Reference levels assume far-field conditions. Stay clear of energised antennas."
)

"""Error types that the CLI turns into one-line messages with a non-zero exit."""


class MeterlinkError(Exception):
    """A user-facing problem (bad input, missing file, unusable port): printed as one line."""

    exit_code = 2


class ProtocolError(MeterlinkError):
    """Bytes from a device that do not form a valid frame (bad CRC, length, type, payload)."""


class CertificateError(MeterlinkError):
    """A calibration certificate that is malformed, incomplete or unusable."""


class LinkError(MeterlinkError):
    """A serial port or URL that cannot be opened or stops answering."""

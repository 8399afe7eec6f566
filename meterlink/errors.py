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


def read_input_text(path, what: str, error: type[MeterlinkError] = MeterlinkError) -> str:
    """The UTF-8 text of an input file (plan, certificate, station file, ...), or `error` naming the
    file and the reason in words: missing, a directory, unreadable, or not text (a PNG, say)."""
    from pathlib import Path

    p = Path(path)
    try:
        data = p.read_bytes()
    except FileNotFoundError:
        raise error(f"{p}: no such {what} file") from None
    except IsADirectoryError:
        raise error(f"{p}: is a directory, not a {what} file") from None
    except OSError as exc:
        raise error(f"{p}: cannot read {what} file: {exc.strerror}") from None
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise error(f"{p}: not a {what} file: not UTF-8 text (byte {exc.start} is 0x{data[exc.start]:02x}); "
                    f"a {what} file is TOML text") from None
    if "\x00" in text:
        raise error(f"{p}: not a {what} file: it holds NUL bytes; a {what} file is TOML text") from None
    return text


def read_input_toml(path, what: str, error: type[MeterlinkError] = MeterlinkError) -> dict:
    """An input file read by read_input_text and parsed as TOML; a syntax error is `error` naming the file."""
    import tomllib

    try:
        return tomllib.loads(read_input_text(path, what, error))
    except tomllib.TOMLDecodeError as exc:
        raise error(f"{path}: not valid TOML ({exc})".replace("\n", " ")) from None

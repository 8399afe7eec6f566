"""The lab's register of issued certificate numbers: each number is issued once and never reused.

A plain text file, one line per certificate: number, time issued (UTC), probe serial, file. It is
locked (flock) while a number is chosen and the certificate written, so that two runs at once
cannot take the same number, and a line is added only once the certificate has been written.
Issued numbers run on a lab-wide counter, LAB-<date>-<counter>; a number given in the session
file is checked against the register and refused if it was issued before.
"""

from __future__ import annotations

import datetime as _dt
import fcntl
import os
from contextlib import contextmanager
from pathlib import Path

from meterlink.lab.session import LabError

REGISTER_NAME = "lab-register.tsv"
HEADER = "# meterlink lab register: certificate number, issued (UTC), probe serial, certificate file (tab-separated)\n"


def default_register(out_dir) -> Path:
    """The register next to the out folder (shared by every run whose out folders sit side by side)."""
    return Path(out_dir).resolve().parent / REGISTER_NAME


def read_register(path) -> list[list[str]]:
    """The register's lines as [number, issued, serial, file] ([] if there is no register yet)."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        return []
    except (OSError, UnicodeDecodeError) as exc:
        raise LabError(f"{p}: cannot read the certificate register ({exc})") from None
    return [line.split("\t") for line in text.splitlines() if line.strip() and not line.startswith("#")]


@contextmanager
def issue(path, serial: str, cert_file, requested: str = "", now: _dt.datetime | None = None):
    """Yield the certificate number to use; it is entered in the register when the block succeeds.

    requested: a number from the session file (refused if already issued), or "" to be issued one.
    """
    p = Path(path)
    try:
        fh = open(p, "a+", encoding="utf-8")
    except OSError as exc:
        raise LabError(f"{p}: cannot open the certificate register ({exc.strerror})") from None
    with fh:
        fcntl.flock(fh.fileno(), fcntl.LOCK_EX)   # held until the line is written (closing releases it)
        fh.seek(0)
        try:
            rows = [line.rstrip("\n").split("\t") for line in fh if line.strip() and not line.startswith("#")]
        except UnicodeDecodeError:
            raise LabError(f"{p}: the certificate register is not UTF-8 text") from None
        issued = {r[0]: r for r in rows}
        when = now or _dt.datetime.now(_dt.timezone.utc)
        if requested:
            if requested in issued:
                r = issued[requested]
                raise LabError(f"{p}: certificate number {requested!r} was already issued "
                               f"({r[1] if len(r) > 1 else 'date unknown'}); numbers are never reused: give a new "
                               "calibration.certificate_number or leave it out to have one issued")
            number = requested
        else:
            n = len(rows) + 1
            number = f"LAB-{when:%Y%m%d}-{n:04d}"
            while number in issued:
                n += 1
                number = f"LAB-{when:%Y%m%d}-{n:04d}"
        yield number
        fh.seek(0, os.SEEK_END)
        if fh.tell() == 0:
            fh.write(HEADER)
        fh.write("\t".join((number, when.isoformat(timespec="seconds"), _clean(serial), _clean(str(cert_file))))
                 + "\n")
        fh.flush()
        os.fsync(fh.fileno())


def _clean(text: str) -> str:
    """One register field: no tabs or line breaks."""
    return " ".join(str(text).split())

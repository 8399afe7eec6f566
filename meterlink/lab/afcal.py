"""Antenna-factor calibration of a receiving dipole by the standard-field method, over SCPI.

A signal generator (through whatever amplifier follows it) feeds a transmitting antenna of known gain; a
power meter on a coupler reads the net power into it; the dipole under calibration stands at distance d
on the transmitting antenna's boresight, in its far field, and a spectrum analyser reads the tone the
dipole delivers through a cable of known loss. Per frequency and repeat: net power, one analyser sweep,
net power again; the field follows from the mean power by E = sqrt(Z0 P G / (4 pi)) / d and
AF = E / V (meterlink.physics.antenna_cal). Every repeat is appended to a journal file (CSV, flushed)
as it is taken, so an instrument that fails part-way loses nothing already measured.

Bench file (TOML, docs/instruments.md):
    [instruments]     generator, power_meter, analyzer = VISA addresses
    [chain]           coupling_db, path_gain_db, max_level_dbm, timeout_s (as the probe bench)
    [standard_field]  distance_m, largest_dimension_m, field_v_per_m, freq_hz = [...],
                      tx_gain_freq_hz/tx_gain_dbi (the transmitting antenna's certificate),
                      rx_cable_freq_hz/rx_cable_db (the cable from the dipole to the analyser),
                      optional rbw_hz, span_hz, points, ref_level_dbm, attenuation_db
"""

from __future__ import annotations

import csv
import math
import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from meterlink.errors import read_input_text, read_input_toml
from meterlink.lab.session import LabError
from meterlink.physics.antenna_cal import AfReading, SubReading, far_field_min_distance_m, standard_field_power_w

PROCEDURE = "dipole-af"
JOURNAL_COLUMNS = ("freq_hz", "repeat", "net_before_dbm", "net_after_dbm", "analyser_dbm")
MIN_TONE_OVER_FLOOR_DB = 20.0      # the tone must stand this far above the trace's median (noise floor)
COARSE_LEVEL_DB = 0.5              # the field is set to within this of the wanted one (it is measured anyway)


def _logf_interp(pairs, freq_hz):
    """A (freq_hz, value) table read at freq_hz, linear in log-frequency (as the certificates' tables)."""
    f, x = zip(*pairs)
    return np.interp(np.log10(freq_hz), np.log10(f), x)


@dataclass(frozen=True)
class AfBench:
    generator: str
    power_meter: str
    analyzer: str
    coupling_db: float
    distance_m: float
    largest_dimension_m: float
    field_v_per_m: float
    freq_hz: tuple[float, ...]
    tx_gain: tuple[tuple[float, float], ...]      # (freq_hz, dBi)
    rx_cable: tuple[tuple[float, float], ...]     # (freq_hz, dB)
    path_gain_db: float = 0.0
    max_level_dbm: float = 10.0
    timeout_s: float = 5.0
    rbw_hz: float = 10e3
    span_hz: float = 200e3
    points: int = 201
    ref_level_dbm: float = 10.0
    attenuation_db: float = 10.0

    def tx_gain_dbi(self, freq_hz):
        """The transmitting antenna's gain from its certificate, linear in log-frequency."""
        return _logf_interp(self.tx_gain, freq_hz)

    def rx_cable_db(self, freq_hz):
        return _logf_interp(self.rx_cable, freq_hz)


def load_af_bench(path) -> AfBench:
    """Read a standard-field bench file; every problem names the file and the key."""
    where = str(path)
    doc = read_input_toml(path, "bench", LabError)
    inst, chain, sf = doc.get("instruments"), doc.get("chain"), doc.get("standard_field")
    if not all(isinstance(t, dict) for t in (inst, chain, sf)):
        raise LabError(f"{where}: needs [instruments], [chain] and [standard_field] tables")

    def text(key):
        v = inst.get(key)
        if not isinstance(v, str) or not v.strip():
            raise LabError(f"{where}: instruments.{key}: a VISA address as text")
        return v.strip()

    def num(t, name, key, lo, hi, default=None):
        v = t.get(key, default)
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not (math.isfinite(v) and lo <= v <= hi):
            raise LabError(f"{where}: {name}.{key}: a number in {lo:g}..{hi:g}")
        return float(v)

    def nums(key, lo, hi, increasing=True):
        v = sf.get(key)
        if (not isinstance(v, list) or not v or any(isinstance(x, bool) or not isinstance(x, (int, float))
                                                    or not (math.isfinite(x) and lo <= x <= hi) for x in v)):
            raise LabError(f"{where}: standard_field.{key}: a list of numbers in {lo:g}..{hi:g}")
        if increasing and any(b <= a for a, b in zip(v, v[1:])):
            raise LabError(f"{where}: standard_field.{key}: must be strictly increasing")
        return tuple(float(x) for x in v)

    def table(fkey, vkey, lo, hi):
        f, x = nums(fkey, 1e3, 3e11), nums(vkey, lo, hi, increasing=False)
        if len(f) != len(x):
            raise LabError(f"{where}: standard_field.{fkey} and .{vkey}: {len(f)} and {len(x)} values")
        return tuple(zip(f, x))

    return AfBench(
        text("generator"), text("power_meter"), text("analyzer"), num(chain, "chain", "coupling_db", -10.0, 80.0),
        num(sf, "standard_field", "distance_m", 0.1, 1000.0), num(sf, "standard_field", "largest_dimension_m", 0.001, 100.0),
        num(sf, "standard_field", "field_v_per_m", 1e-3, 200.0), nums("freq_hz", 9e3, 3e11),
        table("tx_gain_freq_hz", "tx_gain_dbi", -20.0, 40.0), table("rx_cable_freq_hz", "rx_cable_db", 0.0, 60.0),
        num(chain, "chain", "path_gain_db", -60.0, 80.0, 0.0), num(chain, "chain", "max_level_dbm", -100.0, 30.0, 10.0),
        num(chain, "chain", "timeout_s", 0.1, 120.0, 5.0), num(sf, "standard_field", "rbw_hz", 1.0, 10e6, 10e3),
        num(sf, "standard_field", "span_hz", 100.0, 1e9, 200e3), int(num(sf, "standard_field", "points", 101, 100_001, 201)),
        num(sf, "standard_field", "ref_level_dbm", -100.0, 30.0, 10.0),
        num(sf, "standard_field", "attenuation_db", 0.0, 70.0, 10.0))


def check_plan(bench: AfBench) -> None:
    """Refuse, before any RF is on, a frequency outside the far field or outside the gain or cable tables."""
    for f in bench.freq_hz:
        need = float(far_field_min_distance_m(f, bench.largest_dimension_m))
        if bench.distance_m < need:
            raise LabError(f"{f / 1e6:g} MHz: distance {bench.distance_m:g} m is not in the far field "
                           f"(needs {need:.2f} m: 2 D^2/lambda and one wavelength)")
        for name, t in (("tx_gain", bench.tx_gain), ("rx_cable", bench.rx_cable)):
            if not t[0][0] <= f <= t[-1][0]:
                raise LabError(f"{f / 1e6:g} MHz: outside the {name} table ({t[0][0] / 1e6:g}..{t[-1][0] / 1e6:g} MHz)")


class Journal:
    """The readings as they are taken: CSV lines appended and flushed to disk one by one."""

    COLUMNS = JOURNAL_COLUMNS

    def __init__(self, path):
        self.path = Path(path)
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            self.fh = open(self.path, "x", newline="", encoding="utf-8")
        except FileExistsError:
            raise LabError(f"{self.path}: a journal of an earlier run is there; it is kept: choose a new --out "
                           "folder") from None
        except OSError as exc:
            raise LabError(f"{self.path}: cannot write the journal ({exc.strerror})") from None
        self.w = csv.writer(self.fh)
        self.w.writerow(self.COLUMNS)
        self._sync()
        self.count = 0

    def _sync(self):
        self.fh.flush()
        os.fsync(self.fh.fileno())

    def add(self, r: AfReading) -> None:
        self.w.writerow([repr(r.freq_hz), r.repeat, repr(r.net_before_dbm), repr(r.net_after_dbm), repr(r.analyser_dbm)])
        self._sync()
        self.count += 1

    def close(self) -> None:
        self.fh.close()


def read_journal(path) -> list[AfReading]:
    """The readings of a journal file (one-line LabError on a malformed line)."""
    p = Path(path)
    text = read_input_text(p, "journal", LabError)
    rows = list(csv.reader(text.splitlines()))
    if not rows or tuple(rows[0]) != JOURNAL_COLUMNS:
        raise LabError(f"{p}: line 1: expected the columns {','.join(JOURNAL_COLUMNS)}")
    out = []
    for i, row in enumerate(rows[1:], start=2):
        try:
            f, rep, a, b, v = row
            r = AfReading(float(f), int(rep), float(a), float(b), float(v))
        except ValueError:
            raise LabError(f"{p}: line {i}: expected five numbers") from None
        if not all(math.isfinite(x) for x in (r.freq_hz, r.net_before_dbm, r.net_after_dbm, r.analyser_dbm)):
            raise LabError(f"{p}: line {i}: not a finite number")
        out.append(r)
    return out


class AfProcedure:
    """The SCPI driving; use as a context manager (RF is left off on leaving, whatever happened)."""

    def __init__(self, bench: AfBench):
        self.bench = bench
        self.sessions = []

    def __enter__(self) -> "AfProcedure":
        from meterlink.instruments.analyzer import SpectrumAnalyzer
        from meterlink.instruments.bench import PowerMeter, SignalGenerator
        from meterlink.instruments.session import open_session

        b = self.bench
        try:
            for addr in (b.generator, b.power_meter, b.analyzer):
                self.sessions.append(open_session(addr, timeout_s=b.timeout_s))
        except Exception:
            self.__exit__()
            raise
        self.gen, self.pm, self.sa = (SignalGenerator(self.sessions[0]), PowerMeter(self.sessions[1]),
                                      SpectrumAnalyzer(self.sessions[2]))
        self.gen.rf(False)
        self.pm.zero()
        return self

    def __exit__(self, *exc) -> None:
        if self.sessions:
            from meterlink.instruments.bench import SignalGenerator
            try:
                SignalGenerator(self.sessions[0]).rf(False)      # leave no field on
            except Exception:  # the generator may be the instrument that failed; closing is all that is left
                pass
        for s in self.sessions:
            s.close()
        self.sessions = []

    def _net_dbm(self) -> float:
        return self.pm.read_dbm() + self.bench.coupling_db

    def _set(self, freq_hz: float, level_dbm: float) -> None:
        if level_dbm > self.bench.max_level_dbm:
            self.gen.rf(False)
            raise LabError(f"{self.bench.generator}: {level_dbm:.2f} dBm needed at {freq_hz / 1e6:g} MHz is above "
                           f"the bench's max_level_dbm {self.bench.max_level_dbm:g}")
        self.gen.set(freq_hz, level_dbm)

    def measure(self, freq_hz: float, repeats: int, keep=None) -> list[AfReading]:
        """The repeats at one frequency: field on, analyser set, (power, sweep, power) x repeats, field off;
        keep(reading) is called with each repeat as soon as it is taken."""
        b = self.bench
        want_dbm = 10 * math.log10(float(standard_field_power_w(b.field_v_per_m, float(b.tx_gain_dbi(freq_hz)),
                                                                  b.distance_m)) / 1e-3)
        self.pm.set_frequency(freq_hz)
        level = want_dbm - b.path_gain_db
        self._set(freq_hz, level)
        self.gen.rf(True)
        err = want_dbm - self._net_dbm()
        if abs(err) > COARSE_LEVEL_DB:          # once: the field is measured, not levelled
            level += err
            self._set(freq_hz, level)
        self.sa.set_center_span(freq_hz, b.span_hz)
        self.sa.set_bandwidths(b.rbw_hz, 3 * b.rbw_hz)
        self.sa.set_detector("rms")
        self.sa.set_sweep(points=b.points)
        self.sa.set_levels(b.ref_level_dbm, b.attenuation_db)
        out = []
        for i in range(repeats):
            before = self._net_dbm()
            sw = self.sa.sweep(binary=True)
            after = self._net_dbm()
            out.append(AfReading(float(freq_hz), i + 1, before, after, self._tone_dbm(sw, freq_hz)))
            if keep is not None:
                keep(out[-1])
        self.gen.rf(False)
        return out

    def _tone_dbm(self, sw, freq_hz: float) -> float:
        """The tone's level: the trace's largest point, which must sit within one bin of the generator's
        frequency and stand MIN_TONE_OVER_FLOOR_DB above the median of the trace."""
        lv = sw.level_dbm
        if not np.all(np.isfinite(lv)):
            raise LabError(f"{self.bench.analyzer}: the trace at {freq_hz / 1e6:g} MHz holds values that are not numbers")
        i = int(np.argmax(lv))
        step = (sw.freq_hz[-1] - sw.freq_hz[0]) / max(len(sw.freq_hz) - 1, 1)
        if abs(sw.freq_hz[i] - freq_hz) > 1.01 * step:
            raise LabError(f"{self.bench.analyzer}: largest signal at {sw.freq_hz[i] / 1e6:.6f} MHz, not at the "
                           f"generator's {freq_hz / 1e6:.6f} MHz")
        if lv[i] - float(np.median(lv)) < MIN_TONE_OVER_FLOOR_DB:
            raise LabError(f"{self.bench.analyzer}: the tone at {freq_hz / 1e6:g} MHz is less than "
                           f"{MIN_TONE_OVER_FLOOR_DB:g} dB above the noise floor; raise the field")
        return float(lv[i])


def run(bench: AfBench, journal: Journal, repeats: int = 3, progress=None) -> list[AfReading]:
    """Every planned frequency; each repeat goes to the journal as it is taken."""
    if repeats < 2:
        raise LabError("--repeats must be at least 2 (Type A needs repeats)")
    check_plan(bench)
    out: list[AfReading] = []
    with AfProcedure(bench) as proc:
        for k, f in enumerate(bench.freq_hz):
            out += proc.measure(f, repeats, keep=journal.add)
            if progress:
                progress(k + 1, len(bench.freq_hz), f)
    return out


# -- substitution (reference-antenna) method ------------------------------------------------------------------
#
# The same bench sets up a field at the antenna position (level set from the standard-field estimate, then not
# relied on); the reference antenna measures it at every frequency, the operator mounts the antenna under test
# in its place, and it measures the same frequencies. Per frequency and repeat the pair gives
# AF_dut = AF_ref + (V_ref - P_ref) - (V_dut - P_dut) (meterlink.physics.antenna_cal.sub_point). Bench file: the
# standard-field bench plus a [substitution] table: ref_name, ref_certificate, ref_af_freq_hz, ref_af_db_per_m.

METHODS = ("standard-field", "substitution")
SUB_PHASES = ("reference", "dut")


@dataclass(frozen=True)
class SubSpec:
    """The reference antenna of a substitution: its identity, certificate and antenna-factor table."""

    ref_name: str
    ref_certificate: str
    ref_af: tuple[tuple[float, float], ...]       # (freq_hz, dB/m)

    def ref_af_db_per_m(self, freq_hz):
        return _logf_interp(self.ref_af, freq_hz)


def load_substitution(path) -> SubSpec:
    """The [substitution] table of a bench file; every problem names the file and the key."""
    where = str(path)
    doc = read_input_toml(path, "bench", LabError)
    t = doc.get("substitution")
    if not isinstance(t, dict):
        raise LabError(f"{where}: --method substitution needs a [substitution] table (ref_name, ref_certificate, "
                       "ref_af_freq_hz, ref_af_db_per_m)")
    for key in ("ref_name", "ref_certificate"):
        if not isinstance(t.get(key), str) or not t[key].strip():
            raise LabError(f"{where}: substitution.{key}: text naming the reference antenna and its certificate")
    f, x = t.get("ref_af_freq_hz"), t.get("ref_af_db_per_m")
    ok = (isinstance(f, list) and isinstance(x, list) and len(f) == len(x) >= 2
          and all(not isinstance(v, bool) and isinstance(v, (int, float)) and math.isfinite(v) for v in f + x)
          and all(9e3 <= v <= 3e11 for v in f) and all(b > a for a, b in zip(f, f[1:]))
          and all(-20.0 <= v <= 80.0 for v in x))
    if not ok:
        raise LabError(f"{where}: substitution.ref_af_freq_hz / ref_af_db_per_m: two lists of the same length (2 or "
                       "more), frequencies strictly increasing in 9e3..3e11 Hz, antenna factors in -20..80 dB/m")
    return SubSpec(t["ref_name"].strip(), t["ref_certificate"].strip(),
                   tuple(zip((float(v) for v in f), (float(v) for v in x))))


def check_substitution(bench: AfBench, sub: SubSpec) -> None:
    """Refuse, before any RF is on, a frequency outside the reference antenna's table."""
    lo, hi = sub.ref_af[0][0], sub.ref_af[-1][0]
    for f in bench.freq_hz:
        if not lo <= f <= hi:
            raise LabError(f"{f / 1e6:g} MHz: outside the reference antenna's table ({lo / 1e6:g}..{hi / 1e6:g} MHz)")


class SubJournal(Journal):
    """The substitution's readings as taken: which antenna was mounted, then the standard-field columns."""

    COLUMNS = ("antenna",) + JOURNAL_COLUMNS

    def add(self, antenna: str, r: AfReading) -> None:
        self.w.writerow([antenna, repr(r.freq_hz), r.repeat, repr(r.net_before_dbm), repr(r.net_after_dbm),
                         repr(r.analyser_dbm)])
        self._sync()
        self.count += 1


def is_sub_journal(path) -> bool:
    """Whether a journal file is a substitution journal (its header starts with the antenna column)."""
    try:
        with open(path, encoding="utf-8", errors="replace") as fh:
            return fh.readline().strip() == ",".join(SubJournal.COLUMNS)
    except OSError:
        return False            # read_journal says what is wrong with it


def read_sub_journal(path) -> list[tuple[str, AfReading]]:
    """The (antenna, reading) pairs of a substitution journal (one-line LabError on a malformed line)."""
    p = Path(path)
    rows = list(csv.reader(read_input_text(p, "journal", LabError).splitlines()))
    if not rows or tuple(rows[0]) != SubJournal.COLUMNS:
        raise LabError(f"{p}: line 1: expected the columns {','.join(SubJournal.COLUMNS)}")
    out = []
    for i, row in enumerate(rows[1:], start=2):
        try:
            antenna, f, rep, a, b, v = row
            r = AfReading(float(f), int(rep), float(a), float(b), float(v))
        except ValueError:
            raise LabError(f"{p}: line {i}: expected the antenna and five numbers") from None
        if antenna not in SUB_PHASES:
            raise LabError(f"{p}: line {i}: antenna {antenna!r} is not one of {', '.join(SUB_PHASES)}")
        if not all(math.isfinite(x) for x in (r.freq_hz, r.net_before_dbm, r.net_after_dbm, r.analyser_dbm)):
            raise LabError(f"{p}: line {i}: not a finite number")
        out.append((antenna, r))
    return out


def pair_substitution(taken) -> list[SubReading]:
    """SubReadings from (antenna, AfReading) pairs: repeat i of the reference with repeat i of the antenna under
    test at each frequency; a frequency or repeat measured with one antenna only is left out (a stopped run)."""
    by = {}
    for antenna, r in taken:
        by[(antenna, r.freq_hz, r.repeat)] = r
    out = []
    for (antenna, f, rep), ref in sorted(by.items(), key=lambda kv: (kv[0][1], kv[0][2])):
        dut = by.get(("dut", f, rep))
        if antenna != "reference" or dut is None:
            continue
        net = lambda r: 10 * math.log10((10 ** (r.net_before_dbm / 10) + 10 ** (r.net_after_dbm / 10)) / 2)  # noqa: E731
        out.append(SubReading(f, rep, net(ref), ref.analyser_dbm, net(dut), dut.analyser_dbm))
    return out


def run_substitution(bench: AfBench, sub: SubSpec, journal: SubJournal, swap, repeats: int = 3,
                     progress=None) -> list[SubReading]:
    """The reference antenna at every planned frequency, then (after swap("dut")) the antenna under test at the
    same ones; swap(phase) is called before each phase (the operator mounts that antenna). Each repeat goes to
    the journal as taken."""
    if repeats < 2:
        raise LabError("--repeats must be at least 2 (Type A needs repeats)")
    check_plan(bench)
    check_substitution(bench, sub)
    taken = []
    with AfProcedure(bench) as proc:
        for k, phase in enumerate(SUB_PHASES):
            swap(phase)
            for j, f in enumerate(bench.freq_hz):
                for r in proc.measure(f, repeats, keep=lambda r, ph=phase: journal.add(ph, r)):
                    taken.append((phase, r))
                if progress:
                    progress(k * len(bench.freq_hz) + j + 1, 2 * len(bench.freq_hz), f)
    return pair_substitution(taken)

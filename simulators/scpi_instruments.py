"""Command tables of the simulated SCPI instruments: a spectrum analyser that sees the scenario's invented
site through an antenna and cable, a signal generator, a power meter and a rotator.

The analyser's displayed level per trace point is what a swept analyser with a Gaussian resolution
filter shows: a CW emitter as the filter's power response P*exp(-4 ln2 (df/RBW)^2) around its
carrier; a noise-like emitter (flat over its occupied bandwidth) as its density times the filter's
power response integrated over the band; plus the displayed average noise level. The rms detector
shows that power; the peak detector adds 9 dB to noise-like signals (a choice of the simulator, of the
order of the peak-to-rms ratio of Gaussian noise over a sweep point).
"""

from __future__ import annotations

import math
import struct

import numpy as np
from scipy.special import erf

from meterlink.physics.units import antenna_factor_db_per_m
from meterlink.simulators.instruments import _interp_logf
from meterlink.simulators.scene import Path, SiteScene
from meterlink.simulators.scpi_server import Instrument, ScpiFault, number

#: Occupied bandwidth (Hz) and spectrum kind by technology, for the simulated spectrum only.
SPECTRA = {
    "FM": (0.0, "cw"),          # shown as an unmodulated carrier (a simplification of the simulator)
    "GSM": (0.0, "cw"),
    "DAB": (1.536e6, "noise"),
    "DVB-T": (7.61e6, "noise"),
    "LTE": (9.0e6, "noise"),
    "UMTS": (3.84e6, "noise"),
    "NR": (38.16e6, "noise"),
}
DANL_DBM_PER_HZ = -155.0        # displayed average noise level with 0 dB attenuation
PEAK_OVER_RMS_NOISE_DB = 9.0
LEVEL_ERROR_DB = 0.25           # the simulated analyser reads this much high (within its stated accuracy)
JITTER_DB_RMS = 0.05            # sweep-to-sweep scatter of the rms detector
MAX_POINTS = 200_001


def gaussian_nbw_hz(rbw_hz: float) -> float:
    """Noise bandwidth of a Gaussian filter of 3 dB width RBW: RBW*sqrt(pi/(4 ln 2)) ~ 1.0645 RBW."""
    return rbw_hz * math.sqrt(math.pi / (4 * math.log(2)))


class SiteAntenna:
    """The field of the scenario's emitters at one point, seen through an antenna + cable chain."""

    def __init__(self, scenario, position_m, t_s: float = 0.0, antenna: str = "isotropic"):
        meter = scenario.meters[0].scene
        self.scene = SiteScene(scenario.meters[0].scene.transmitters, Path.fixed(position_m),
                               start_time_of_day_h=meter.start_time_of_day_h, excursions=meter.excursions)
        self.t_s = float(t_s)
        self.receiver = scenario.receiver
        self.antenna = antenna      # "x", "y", "z" (a dipole along that site axis) or "isotropic"

    def emitter_fields(self) -> tuple[list, np.ndarray]:
        """(transmitters, RMS E vectors (n, 3) in site axes) at the point."""
        txs = self.scene.transmitters
        _, e, _ = self.scene.source_fields(self.t_s)
        return list(txs), e

    def truth(self) -> list[dict]:
        """Per emitter: name, frequency, |E| (V/m) at the point: the simulator's ground truth."""
        txs, e = self.emitter_fields()
        return [{"name": t.name, "freq_hz": t.freq_hz, "technology": t.technology,
                 "e_v_per_m": float(np.linalg.norm(v))} for t, v in zip(txs, e)]

    def input_power_w(self) -> tuple[list, np.ndarray]:
        """Power each emitter delivers into the analyser's 50 ohm input through antenna and cable."""
        txs, e = self.emitter_fields()
        if self.antenna == "isotropic":
            e_seen = np.linalg.norm(e, axis=1)
        else:
            e_seen = np.abs(e[:, "xyz".index(self.antenna)])
        f = np.array([t.freq_hz for t in txs])
        af_db = antenna_factor_db_per_m(_interp_logf(self.receiver.antenna_gain_dbi, f), f)
        loss_db = _interp_logf(self.receiver.cable_loss_db, f)
        v = e_seen / 10 ** (af_db / 20) / 10 ** (loss_db / 20)
        return txs, v * v / 50.0


class Analyzer(Instrument):
    """Swept spectrum analyser (see meterlink.instruments.analyzer for the dialect)."""

    IDN = "meterlink,SIM-SA,SA-0001,1.0"

    def __init__(self, site: SiteAntenna, seed: int = 0):
        super().__init__()
        self.site = site
        self.rng = np.random.default_rng(seed)
        self.st = {"start": 9e3, "stop": 6e9, "rbw": 1e6, "vbw": 3e6, "det": "RMS", "swt": 0.5, "points": 1001,
                   "rlev": 0.0, "att": 10.0, "form": "ASC", "bord": "NORM", "cont": True}
        self.trace: np.ndarray | None = None
        self.sweeps = 0

    def spectrum_dbm(self) -> np.ndarray:
        """The displayed level (dBm) at each trace point under the present settings."""
        s = self.st
        f = np.linspace(s["start"], s["stop"], int(s["points"]))
        rbw = s["rbw"]
        sigma = rbw / math.sqrt(8 * math.log(2))          # exp(-4 ln2 x^2/RBW^2) = exp(-x^2/(2 sigma^2))
        nbw = gaussian_nbw_hz(rbw)
        p = np.full(f.shape, 10 ** ((DANL_DBM_PER_HZ + s["att"]) / 10) * 1e-3 * nbw)
        txs, pw = self.site.input_power_w()
        peak_extra = np.zeros(f.shape)
        for t, pt in zip(txs, pw):
            bw, kind = SPECTRA.get(t.technology, (0.0, "cw"))
            if kind == "cw" or bw <= 0:
                p += pt * np.exp(-4 * math.log(2) * ((f - t.freq_hz) / rbw) ** 2)
            else:
                lo, hi = t.freq_hz - bw / 2, t.freq_hz + bw / 2
                frac = 0.5 * (erf((hi - f) / (sigma * math.sqrt(2))) - erf((lo - f) / (sigma * math.sqrt(2))))
                add = pt / bw * nbw * frac                 # density * integral of the power response over the band
                p += add
                peak_extra += add
        if s["det"] == "POS":
            p = p + peak_extra * (10 ** (PEAK_OVER_RMS_NOISE_DB / 10) - 1)
        level = 10 * np.log10(p / 1e-3) + LEVEL_ERROR_DB
        return level + self.rng.normal(0.0, JITTER_DB_RMS, level.shape)

    def command(self, h, arg, query):
        s = self.st
        table = {"FREQ:CENT": None, "FREQ:SPAN": None, "FREQ:STAR": ("start", 0, 26.5e9), "FREQ:STOP": ("stop", 0, 26.5e9),
                 "BAND": ("rbw", 1.0, 10e6), "BAND:RES": ("rbw", 1.0, 10e6), "BAND:VID": ("vbw", 1.0, 50e6),
                 "SWE:TIME": ("swt", 1e-4, 1e4), "SWE:POIN": ("points", 101, MAX_POINTS),
                 "DISP:WIND:TRAC:Y:RLEV": ("rlev", -150.0, 30.0), "INP:ATT": ("att", 0.0, 70.0)}
        if h in table:
            spec = table[h]
            if h in ("FREQ:CENT", "FREQ:SPAN"):
                c, w = (s["start"] + s["stop"]) / 2, s["stop"] - s["start"]
                if query:
                    return repr(c if h == "FREQ:CENT" else w)
                v = number(arg, 0, 26.5e9)
                c, w = (v, w) if h == "FREQ:CENT" else (c, v)
                w = min(w, 2 * c)               # the span shrinks to keep the start at or above 0 Hz
                s["start"], s["stop"] = c - w / 2, c + w / 2
                return None
            key, lo, hi = spec
            if query:
                return repr(int(s[key]) if key == "points" else float(s[key]))
            span = s["stop"] - s["start"]
            s[key] = number(arg, lo, hi)
            # coupled edges, as swept analysers do: an edge set past the other one drags it along
            if key == "start" and s["start"] >= s["stop"]:
                s["stop"] = s["start"] + span
            elif key == "stop" and s["stop"] <= s["start"]:
                s["start"] = max(0.0, s["stop"] - span)
                if s["start"] >= s["stop"]:
                    raise ScpiFault(-221, "Settings conflict")
            return None
        if h in ("DET", "DET:FUNC"):
            if query:
                return s["det"]
            a = arg.upper()
            if a not in ("RMS", "POS", "POSITIVE", "AVER"):
                raise ScpiFault(-224, "Illegal parameter value")
            s["det"] = a[:3] if a.startswith("POS") else a
            return None
        if h == "INIT:CONT" and not query:
            s["cont"] = arg.upper() in ("ON", "1")
            return None
        if h in ("INIT", "INIT:IMM") and not query:
            self.trace = self.spectrum_dbm()
            self.sweeps += 1
            return None
        if h == "FORM" or h == "FORM:DATA":
            if query:
                return "REAL,32" if s["form"] == "REAL" else "ASC,8"
            a = arg.upper().replace(" ", "")
            if a.startswith("ASC"):
                s["form"] = "ASC"
            elif a in ("REAL,32", "REAL"):
                s["form"] = "REAL"
            else:
                raise ScpiFault(-224, "Illegal parameter value")
            return None
        if h == "FORM:BORD":
            if query:
                return s["bord"]
            if arg.upper() not in ("NORM", "SWAP"):
                raise ScpiFault(-224, "Illegal parameter value")
            s["bord"] = arg.upper()
            return None
        if h in ("TRAC:DATA", "TRAC") and query:
            if self.trace is None:
                raise ScpiFault(-230, "Data corrupt or stale")
            if s["form"] == "ASC":
                return ",".join(f"{v:.3f}" for v in self.trace)
            data = struct.pack(f"{'<' if s['bord'] == 'SWAP' else '>'}{len(self.trace)}f", *self.trace)
            n = str(len(data))
            return f"#{len(n)}{n}".encode() + data
        raise ScpiFault(-113, "Undefined header")


class Generator(Instrument):
    """CW signal generator: FREQ, POW (dBm), OUTP."""

    IDN = "meterlink,SIM-SG,SG-0001,1.0"

    def __init__(self):
        super().__init__()
        self.freq_hz, self.level_dbm, self.on = 1e9, -30.0, False

    def command(self, h, arg, query):
        if h in ("FREQ", "FREQ:CW", "SOUR:FREQ"):
            if query:
                return repr(self.freq_hz)
            self.freq_hz = number(arg, 9e3, 20e9)
            return None
        if h in ("POW", "POW:LEV", "SOUR:POW"):
            if query:
                return repr(self.level_dbm)
            self.level_dbm = number(arg, -130.0, 20.0)
            return None
        if h in ("OUTP", "OUTP:STAT"):
            if query:
                return "1" if self.on else "0"
            a = arg.upper()
            if a not in ("ON", "OFF", "1", "0"):
                raise ScpiFault(-224, "Illegal parameter value")
            self.on = a in ("ON", "1")
            return None
        raise ScpiFault(-113, "Undefined header")


class PowerMeterSim(Instrument):
    """Power meter reading a generator through a fixed coupling loss (dB)."""

    IDN = "meterlink,SIM-PM,PM-0001,1.0"

    def __init__(self, generator: Generator | None = None, coupling_db: float = 20.0, seed: int = 0):
        super().__init__()
        self.gen, self.coupling_db, self.zeroed, self.freq_hz = generator, coupling_db, False, 1e9
        self.rng = np.random.default_rng(seed)

    def command(self, h, arg, query):
        if h == "CAL:ZERO:AUTO" and not query:
            self.zeroed = True
            return None
        if h == "UNIT:POW" and not query:
            return None
        if h in ("SENS:FREQ", "FREQ"):
            if query:
                return repr(self.freq_hz)
            self.freq_hz = number(arg, 9e3, 20e9)
            return None
        if h in ("READ", "MEAS", "FETC") and query:
            if self.gen is None or not self.gen.on:
                return repr(-70.0 + float(self.rng.normal(0, 0.5)))
            return repr(self.gen.level_dbm - self.coupling_db + float(self.rng.normal(0, 0.01)))
        raise ScpiFault(-113, "Undefined header")


class RotatorSim(Instrument):
    """Turntable: POS:ANGL in degrees, -360..360."""

    IDN = "meterlink,SIM-ROT,ROT-0001,1.0"

    def __init__(self):
        super().__init__()
        self.angle_deg = 0.0

    def command(self, h, arg, query):
        if h in ("POS:ANGL", "POS"):
            if query:
                return repr(self.angle_deg)
            self.angle_deg = number(arg, -360.0, 360.0)
            return None
        raise ScpiFault(-113, "Undefined header")

"""A simulated standard-field bench for the antenna-factor calibration of the demo dipole, on loopback TCP.

Generator -> amplifier -> cable -> coupler (power meter on its coupled port reads the net power less the
coupling) -> transmitting antenna at distance d from the dipole -> the dipole's port -> lab cable ->
spectrum analyser. The physics: the field at the dipole is the far field of the transmitting antenna
with its TRUE gain (its certificate's gain plus TX_GAIN_ERROR_DB, which the lab does not know); the
dipole delivers V = E / AF_true into the cable, AF_true being the scenario dipole's antenna factor
(meterlink.simulators.instruments.true_antenna_factor_db_per_m) plus a known deviation
(af_deviation_db), so a measured AF can be told from the nominal one; the analyser shows that tone with
its own small level error (scpi_instruments.LEVEL_ERROR_DB) and scatter. All values are invented.
"""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np

from meterlink.physics.antenna_cal import standard_field_e_v_per_m
from meterlink.simulators.instruments import _interp_logf, true_antenna_factor_db_per_m
from meterlink.simulators.scpi_instruments import Analyzer
from meterlink.simulators.scpi_lab import AMPLIFIER_GAIN_DB, CABLE_LOSS_DB, COUPLING_DB, _Gen, _Pm
from meterlink.simulators.scpi_server import ScpiServer

DISTANCE_M = 3.0
LARGEST_DIMENSION_M = 0.25
#: The transmitting antenna's certificate (invented): gain on boresight, dBi.
TX_GAIN_TABLE = ((200e6, 5.5), (500e6, 6.0), (1e9, 6.5), (3e9, 8.0), (6e9, 10.0))
TX_GAIN_ERROR_DB = 0.15       # its true gain is this much above the certificate (inside the stated 0.5 dB, k = 2)
#: The lab cable from the dipole to the analyser as the lab states it (dB); the truth is RX_CABLE_ERROR_DB more.
RX_CABLE_TABLE = ((200e6, 0.3), (1e9, 0.8), (3e9, 1.5), (6e9, 2.3))
RX_CABLE_ERROR_DB = 0.03
FREQS_HZ = (200e6, 300e6, 500e6, 700e6, 1e9, 1.5e9, 2e9, 2.5e9, 3e9, 4e9, 5e9, 6e9)
#: The reference antenna of the substitution method: its certificate's antenna factor (invented, dB/m) and how
#: far its true AF lies from that (inside the certificate's stated 0.6 dB, k = 2).
REF_AF_TABLE = ((200e6, 11.0), (500e6, 17.5), (1e9, 23.2), (3e9, 32.6), (6e9, 38.4))
REF_AF_ERROR_DB = -0.12


def af_deviation_db(freq_hz):
    """How far the simulated dipole under calibration is from the scenario's nominal dipole (dB)."""
    return 0.8 + 0.3 * np.log10(np.asarray(freq_hz, dtype=float) / 1e9)


class AfRig:
    """Generator, power meter and analyser of a standard-field bench, served on loopback TCP."""

    def __init__(self, *, seed: int = 0, scenario: str = "demo"):
        from meterlink.simulators.scenario import load_scenario

        self.receiver = load_scenario(scenario).receiver
        self.gen = _Gen(self)
        self.pm = _Pm(self, seed)
        self.analyser = Analyzer(SimpleNamespace(input_power_w=self._analyser_input), seed=seed + 1)
        self.servers: list[ScpiServer] = []
        self.mounted = "dut"        # which antenna stands at the measuring place: "dut" or "reference"

    # the physics -------------------------------------------------------------------------------
    def true_af_db_per_m(self, freq_hz):
        """The simulated dipole's true antenna factor (the truth a test compares with)."""
        return true_antenna_factor_db_per_m(self.receiver, freq_hz) + af_deviation_db(freq_hz)

    def true_ref_af_db_per_m(self, freq_hz) -> float:
        """The reference antenna's true antenna factor: its certificate's, off by REF_AF_ERROR_DB."""
        return float(_interp_logf(REF_AF_TABLE, freq_hz)) + REF_AF_ERROR_DB

    def swap(self, phase: str) -> None:
        """Mount the reference antenna ("reference") or the antenna under test ("dut") at the measuring place."""
        if phase not in ("reference", "dut"):
            raise ValueError(f"no antenna {phase!r}")
        self.mounted = phase

    def net_power_dbm(self) -> float | None:
        return self.gen.level_dbm + AMPLIFIER_GAIN_DB - CABLE_LOSS_DB if self.gen.on else None

    def field_v_per_m(self) -> float:
        """The field at the dipole now: the far field of the transmitting antenna with its true gain."""
        net = self.net_power_dbm()
        if net is None:
            return 0.0
        f = self.gen.freq_hz
        g = float(_interp_logf(TX_GAIN_TABLE, f)) + TX_GAIN_ERROR_DB
        return float(standard_field_e_v_per_m(1e-3 * 10 ** (net / 10), g, DISTANCE_M))

    def _analyser_input(self):
        e = self.field_v_per_m()
        if e <= 0:
            return [], np.zeros(0)
        f = self.gen.freq_hz
        loss = float(_interp_logf(RX_CABLE_TABLE, f)) + RX_CABLE_ERROR_DB
        af = float(self.true_af_db_per_m(f)) if self.mounted == "dut" else self.true_ref_af_db_per_m(f)
        v = e / 10 ** (af / 20) / 10 ** (loss / 20)
        return [SimpleNamespace(freq_hz=f, technology="CW")], np.array([v * v / 50.0])

    def update(self) -> None:      # the generator's hook (scpi_lab._Gen): the field is computed when asked
        return None

    # serving -----------------------------------------------------------------------------------
    def addresses(self) -> dict:
        return {n: s.address for n, s in zip(("generator", "power_meter", "analyzer"), self.servers)}

    def bench_toml(self, field_v_per_m: float = 1.0, freqs_hz=FREQS_HZ) -> str:
        """A bench file (docs/instruments.md) for this rig, valid while it runs."""
        a = self.addresses()
        fmt = ", ".join
        return (f'# simulated standard-field bench (meterlink.simulators.scpi_afcal), valid while it runs\n'
                f'[instruments]\ngenerator = "{a["generator"]}"\npower_meter = "{a["power_meter"]}"\n'
                f'analyzer = "{a["analyzer"]}"\n\n'
                f'[chain]\ncoupling_db = {COUPLING_DB}\npath_gain_db = {AMPLIFIER_GAIN_DB - CABLE_LOSS_DB}\n'
                f'max_level_dbm = 10.0\ntimeout_s = 5.0\n\n'
                f'[standard_field]\ndistance_m = {DISTANCE_M}\nlargest_dimension_m = {LARGEST_DIMENSION_M}\n'
                f'field_v_per_m = {field_v_per_m}\nfreq_hz = [{fmt(repr(float(f)) for f in freqs_hz)}]\n'
                f'tx_gain_freq_hz = [{fmt(repr(f) for f, _ in TX_GAIN_TABLE)}]\n'
                f'tx_gain_dbi = [{fmt(repr(g) for _, g in TX_GAIN_TABLE)}]\n'
                f'rx_cable_freq_hz = [{fmt(repr(f) for f, _ in RX_CABLE_TABLE)}]\n'
                f'rx_cable_db = [{fmt(repr(x) for _, x in RX_CABLE_TABLE)}]\n\n'
                f'[substitution]\nref_name = "reference dipole (simulated)"\n'
                f'ref_certificate = "REF-AF-0001 (invented)"\n'
                f'ref_af_freq_hz = [{fmt(repr(f) for f, _ in REF_AF_TABLE)}]\n'
                f'ref_af_db_per_m = [{fmt(repr(x) for _, x in REF_AF_TABLE)}]\n')

    def __enter__(self) -> "AfRig":
        self.servers = [ScpiServer(i).start() for i in (self.gen, self.pm, self.analyser)]
        return self

    def __exit__(self, *exc) -> None:
        for s in self.servers:
            s.close()
        self.servers = []


__all__ = ["AfRig", "af_deviation_db", "DISTANCE_M", "TX_GAIN_TABLE", "RX_CABLE_TABLE", "FREQS_HZ", "REF_AF_TABLE",
           "REF_AF_ERROR_DB"]

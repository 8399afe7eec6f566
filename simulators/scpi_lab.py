"""A simulated calibration bench driven over SCPI: the generator, power meter and rotator served on loopback
TCP set the field of a LabMeter (the simulated probe on its pty), so `lab run --bench` exercises the same
path as a real bench. The field follows the lab's field-generation relation from the net power the
generator and amplifier really deliver (level plus amplifier gain less cable loss); the power meter sits on a coupler and reads
that net power less the coupling. The probe's direction and tilt are set by the operator (place()).
"""

from __future__ import annotations

import numpy as np

from meterlink.simulators.lab import LabMeter
from meterlink.simulators.scpi_instruments import Generator, PowerMeterSim, RotatorSim
from meterlink.simulators.scpi_server import ScpiFault, ScpiServer, number

CABLE_LOSS_DB = 0.7     # generator to cell, invented
AMPLIFIER_GAIN_DB = 30.0  # power amplifier between generator and cell, invented
COUPLING_DB = 20.0      # coupler's coupled-port attenuation, invented


class _Gen(Generator):
    def __init__(self, rig):
        super().__init__()
        self.rig = rig

    def command(self, h, arg, query):
        out = super().command(h, arg, query)
        if not query:
            self.rig.update()
        return out


class _Rot(RotatorSim):
    """The bench's positioner: turntable angle, and (POS:DIR, POS:TILT) the probe holder's placement."""

    def __init__(self, rig):
        super().__init__()
        self.rig = rig

    def command(self, h, arg, query):
        if h == "POS:DIR" and not query:
            try:
                d = tuple(float(v) for v in arg.split(","))
            except ValueError:
                d = ()
            if len(d) != 3 or not any(d):
                raise ScpiFault(-224, "Illegal parameter value")
            self.rig.direction = d
            out = None
        elif h == "POS:TILT" and not query:
            self.rig.tilt_deg = number(arg, -180.0, 180.0)
            out = None
        else:
            out = super().command(h, arg, query)
        if not query:
            self.rig.update()
        return out


class _Pm(PowerMeterSim):
    def __init__(self, rig, seed):
        super().__init__(None, seed=seed)
        self.rig = rig

    def command(self, h, arg, query):
        if h in ("READ", "MEAS", "FETC") and query:
            net = self.rig.net_power_dbm()
            noise = float(self.rng.normal(0, 0.005))
            return repr((net - COUPLING_DB if net is not None else -70.0) + noise)
        return super().command(h, arg, query)


class ScpiLabRig:
    """LabMeter + SCPI generator, power meter and rotator; use as a context manager."""

    def __init__(self, method, *, seed: int = 0, speed: float = 5.0, field_error_db: float = 0.0, **lab_kw):
        self.method = method
        self.lab = LabMeter(seed=seed, speed=speed, field_error_db=field_error_db, **lab_kw)
        self.gen, self.rot = _Gen(self), _Rot(self)
        self.pm = _Pm(self, seed)
        self.direction, self.tilt_deg = (1.0, 0.0, 0.0), 0.0
        self.servers: list[ScpiServer] = []

    def net_power_dbm(self) -> float | None:
        return self.gen.level_dbm + AMPLIFIER_GAIN_DB - CABLE_LOSS_DB if self.gen.on else None

    def update(self) -> None:
        """Apply the field the present generator and rotator settings make."""
        net = self.net_power_dbm()
        e = 0.0 if net is None else float(self.method.e_from_power(1e-3 * 10 ** (net / 10)))
        if not np.isfinite(e):
            e = 0.0
        self.lab.apply(self.gen.freq_hz, e, self.direction, self.rot.angle_deg, self.tilt_deg)

    def place(self, direction, tilt_deg) -> None:
        """The operator turns the probe in the cell: field direction in probe-holder axes, and tilt."""
        self.direction, self.tilt_deg = tuple(float(v) for v in direction), float(tilt_deg)
        self.update()

    @property
    def port(self) -> str:
        return self.lab.port

    def addresses(self) -> dict:
        names = ("generator", "power_meter", "rotator")
        return {n: s.address for n, s in zip(names, self.servers)}

    def __enter__(self) -> "ScpiLabRig":
        self.lab.start()
        self.servers = [ScpiServer(i).start() for i in (self.gen, self.pm, self.rot)]
        return self

    def __exit__(self, *exc) -> None:
        for s in self.servers:
            s.close()
        self.lab.stop()

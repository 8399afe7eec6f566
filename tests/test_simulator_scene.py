"""Scene physics and the transport-free firmware of the simulated meter."""

import math

import numpy as np
import pytest

from meterlink.device.protocol import (Axes, Empty, Frame, FrameReader, FrameType, STATUS_OVERRANGE, Status,
                                encode_message, parse_payload)
from meterlink.simulators.firmware import Firmware
from meterlink.simulators.scenario import ScenarioError, load_scenario
from meterlink.simulators.scene import (ERP_TO_EIRP, LabScene, Path, SiteScene, Transmitter, free_space_field_v_per_m,
                              traffic_factor)


def test_far_field_matches_published_relation():
    # E = sqrt(Z0 * EIRP / (4 pi)) / d from S = EIRP / (4 pi d^2) = E^2 / Z0, Z0 = sqrt(mu_0/epsilon_0)
    # from scipy.constants; the usual estimate sqrt(30 * EIRP) / d (e.g. ITU-T K.52) rounds Z0/(4 pi)
    # = 29.98 to 30 (the 120 pi shortcut), which the simulator must not use.
    from scipy import constants
    z0 = math.sqrt(constants.mu_0 / constants.epsilon_0)
    for eirp_w, d_m in [(1000.0, 100.0), (16400.0, 58.5), (1.0, 1.0)]:
        e = float(free_space_field_v_per_m(eirp_w, d_m))
        assert e == pytest.approx(math.sqrt(z0 * eirp_w / (4 * math.pi)) / d_m, rel=1e-12)
        assert e == pytest.approx(math.sqrt(30 * eirp_w) / d_m, rel=1e-3)
    assert ERP_TO_EIRP == pytest.approx(10 ** (2.15 / 10), rel=2e-3)  # half-wave dipole 2.15 dBi


def test_projection_keeps_total_field_and_is_transverse():
    tx = Transmitter("t", 100e6, 1000.0, (0.0, 0.0, 50.0), "slant", "FM")
    scene = SiteScene((tx,), Path.fixed((30.0, 40.0, 50.0)), orientation_deg=(33.0, 12.0, -71.0))
    f, e_axes = scene.field(0.0)
    _, e_world, p = scene.source_fields(0.0)
    expect = math.sqrt(30 * 1.64 * 1000.0) / 50.0
    assert float(np.linalg.norm(e_axes)) == pytest.approx(expect, rel=1e-3)
    k = (p - np.array(tx.position_m)) / 50.0
    assert abs(float(e_world[0] @ k)) < 1e-9  # far field: E is perpendicular to propagation


def test_excursion_and_traffic_profile_scale_power():
    sc = load_scenario("station")
    scene = sc.meters[0].scene
    fm = [t.name for t in scene.transmitters].index("Tor FM A")
    e_before = np.linalg.norm(scene.field(50_000.0)[1][fm])
    e_during = np.linalg.norm(scene.field(50_500.0)[1][fm])
    assert e_during / e_before == pytest.approx(math.sqrt(12.0))  # power x12 -> field x sqrt(12)
    assert traffic_factor(4.0) == pytest.approx(0.25) and traffic_factor(16.0) == pytest.approx(1.0)


def test_lab_scene_rotator_turns_the_field_between_axes():
    lab = LabScene(1e9, 10.0, (1.0, 0.0, 0.0), rotator_deg_per_s=90.0)
    np.testing.assert_allclose(np.abs(lab.field(0.0)[1][0]), [10, 0, 0], atol=1e-9)
    np.testing.assert_allclose(np.abs(lab.field(1.0)[1][0]), [0, 10, 0], atol=1e-9)


def test_demo_walk_reaches_a_fraction_of_the_public_level():
    # ICNIRP 2020 Table 5, general public, 30-400 MHz: 27.7 V/m (whole body, 30 min)
    scene = load_scenario("demo").meters[0].scene
    peak_fm = max(float(np.linalg.norm(scene.field(t)[1][0])) for t in range(0, 1800, 30))
    assert 0.3 * 27.7 < peak_fm < 0.6 * 27.7


def test_bad_scenario_is_one_line_error(tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text("[site]\nname='x'\n")
    with pytest.raises(ScenarioError, match="bad"):
        load_scenario(str(bad))
    with pytest.raises(ScenarioError, match="no such"):
        load_scenario("nowhere")


def _frames(data):
    return [parse_payload(f) for f in FrameReader().feed(data) if isinstance(f, Frame)]


def test_station_excursion_drives_mast_foot_probe_into_overrange():
    sc = load_scenario("station")
    fw = Firmware(sc, meter=1, rng=np.random.default_rng(0))
    fw.poll(50_350_000)  # 13:59:10 on day 0, just before the FM excursion
    fw.feed(encode_message(Empty(), 0, 0, FrameType.START))
    fw.poll(50_350_001)
    msgs = _frames(fw.poll(50_460_000))
    axes = [m for m in msgs if isinstance(m, Axes)]
    assert not axes[0].flags & 0b111 and axes[-1].flags & 0b111
    over_status = [m for m in msgs if isinstance(m, Status) and m.flags & STATUS_OVERRANGE]
    assert over_status  # a STATUS goes out when the overrange flag changes


def test_scheduled_restart_and_seq_quirk():
    sc = load_scenario("demo")
    fw = Firmware(sc, rng=np.random.default_rng(0), faults={"schedule": [{"at_s": 3.0, "kind": "restart"}]},
                  quirks={"seq_step": 2})
    fw.feed(encode_message(Empty(), 0, 0, FrameType.START))
    data = fw.poll(0) + fw.poll(5000)
    frames = [f for f in FrameReader().feed(data) if isinstance(f, Frame)]
    types = [f.type for f in frames]
    boots = [f for f in frames if f.type == FrameType.BOOT]
    assert len(boots) == 2 and boots[1].seq == 0 and boots[1].tick_ms == 0
    assert FrameType.AXES not in types[types.index(FrameType.BOOT, 1):]  # not streaming after the reset
    seqs = [f.seq for f in frames[: types.index(FrameType.BOOT, 1)]]
    assert all(b - a == 2 for a, b in zip(seqs, seqs[1:]))  # the rule-breaking step is on the wire

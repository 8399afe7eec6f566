"""DeviceClock: u32 tick unwrapping, UTC mapping, drift slope, restarts (synthetic truth)."""

import numpy as np
import pytest
from hypothesis import given, strategies as st

from meterlink.device.clock import TICK_MOD, DeviceClock, TickUnwrapper, drift_ratio


def test_unwrap_across_the_2_32_wrap():
    # docs/protocol.md, Time: TICK wraps after 2^32 ms; a backward step of more than 2^31 ms is a wrap
    u = TickUnwrapper()
    raw = [TICK_MOD - 2000, TICK_MOD - 1000, 0, 1000, 2000]
    got = [u.unwrap(t) for t in raw]
    assert got == [TICK_MOD - 2000, TICK_MOD - 1000, TICK_MOD, TICK_MOD + 1000, TICK_MOD + 2000]


def test_small_backward_step_is_not_a_wrap_and_late_frame_after_wrap_is_placed_before_it():
    u = TickUnwrapper()
    assert u.unwrap(5000) == 5000
    assert u.unwrap(4500) == 4500  # e.g. a reading timed mid-integration after a STATUS
    v = TickUnwrapper()
    v.unwrap(TICK_MOD - 10)
    assert v.unwrap(20) == TICK_MOD + 20
    assert v.unwrap(TICK_MOD - 5) == TICK_MOD - 5


@given(st.integers(0, TICK_MOD - 1), st.lists(st.integers(1, 2**31 - 1), min_size=1, max_size=40))
def test_unwrap_recovers_any_forward_walk(start, steps):
    truth = start + np.cumsum([0] + steps)
    u = TickUnwrapper()
    got = [u.unwrap(int(t) % TICK_MOD) for t in truth]
    assert np.array_equal(np.array(got) - got[0], truth - truth[0])


def test_utc_mapping_from_handshake():
    c = DeviceClock()
    c.sync(boot=5, tick_u32=1500, utc_s=1_700_000_000.0)
    assert c.utc_of(c.unwrap(1500)) == 1_700_000_000.0
    assert c.utc_of(c.unwrap(124_000)) == pytest.approx(1_700_000_122.5, abs=1e-9)


def test_utc_mapping_across_a_wrap():
    c = DeviceClock()
    c.sync(boot=1, tick_u32=TICK_MOD - 500, utc_s=100.0)
    assert c.utc_of(c.unwrap(TICK_MOD - 500)) == 100.0
    assert c.utc_of(c.unwrap(1500)) == pytest.approx(102.0)


@pytest.mark.parametrize("ppm", [-50.0, 0.0, 37.0, 250.0])
def test_drift_slope_recovered_from_jittery_pairs(ppm):
    # synthetic truth: device runs (1 + ppm*1e-6) x host; host read times jitter by up to 20 ms
    rng = np.random.default_rng(1)
    host = np.arange(0.0, 3600.0, 10.0)
    device = 1000.0 + host * (1 + ppm * 1e-6)
    c = DeviceClock(window=len(host))
    c.sync(1, 1000_000, 0.0)
    for h, d in zip(host + rng.uniform(0, 0.02, host.size), device):
        c.observe(h, c.unwrap(int(round(d * 1000)) % TICK_MOD))
    assert c.drift_ppm() == pytest.approx(ppm, abs=3.0)
    # the latest pair alone would be off by jitter / span; the least-squares slope is not
    assert drift_ratio(host, device) == pytest.approx(1 + ppm * 1e-6, abs=1e-12)


def test_accelerated_clock_ratio_is_reported():
    c = DeviceClock()
    c.sync(1, 0, 0.0)
    for i in range(50):
        c.observe(i * 0.01, c.unwrap(i * 1000))  # 1 s of device time per 10 ms of host time
    assert c.rate_ratio() == pytest.approx(100.0)


def test_drift_needs_three_pairs():
    c = DeviceClock()
    c.sync(1, 0, 0.0)
    c.observe(0.0, 0)
    c.observe(1.0, 1000)
    assert c.rate_ratio() is None and c.drift_ppm() is None
    assert drift_ratio(np.array([1.0, 1.0, 1.0]), np.array([1.0, 2.0, 3.0])) is None


def test_restart_resets_mapping_and_pairs():
    c = DeviceClock()
    c.sync(1, 0, 0.0)
    for i in range(5):
        c.observe(float(i), c.unwrap(i * 1000))
    c.restart()
    assert c.mapping is None and c.n_pairs == 0
    with pytest.raises(ValueError):
        c.utc_of(0)
    c.sync(2, 10, 500.0)
    assert c.mapping.boot == 2 and c.utc_of(c.unwrap(1010)) == pytest.approx(501.0)


def test_new_boot_never_maps_before_times_already_given_out():
    """After a restart of a fast-running device, the session's reading times stay in order."""
    from meterlink.device.clock import DeviceClock

    clock = DeviceClock()
    clock.sync(1, 0, 1000.0)
    last = clock.utc_of(clock.unwrap(500_000))       # device says 500 s later: 1500 s
    clock.restart()
    m = clock.sync(2, 10, 1100.0)                    # host time is only 1100 s
    assert m.utc0_s == last == 1500.0
    assert clock.utc_of(clock.unwrap(1010)) == 1501.0
    fresh = DeviceClock()
    assert fresh.sync(1, 0, 1000.0).utc0_s == 1000.0  # nothing given out yet: host time as it is


def test_utc_at_host_inverts_the_fitted_arrivals_and_ignores_a_late_one():
    # a device clock running 100 times faster than the host (a simulator), mapped at the handshake to
    # utc0 = 1e9 s at tick 0; frames of device second d arrive at host second 10 + d/100, one of
    # them 0.5 s late. Hand-worked: host 10.5 s is device second 50, so 1e9 + 50 s.
    c = DeviceClock()
    c.sync(1, 0, 1e9)
    for d in range(0, 60, 2):
        c.observe(10.0 + d / 100.0 + (0.5 if d == 30 else 0.0), d * 1000)
    assert c.utc_at_host(10.5) == pytest.approx(1e9 + 50.0, abs=0.05)
    assert DeviceClock().utc_at_host(10.0) is None          # no mapping yet

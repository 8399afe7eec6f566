"""NMEA 0183 parsing and the GNSS link, checked against sentences published in public references
(typed from the source, named beside each) and hand-worked ddmm.mmmm -> degree conversions.

The GNSS link tests use the simulated receiver on a real pty opened with pyserial."""

import math
import time

import pytest

from meterlink.device.gnss import (EARTH_RADIUS_M, Fix, GnssLink, SentenceError, UERE_M, estimate_offset,
                                   from_local_m, nmea_checksum, parse_sentence, position_on_track, to_local_m)
from meterlink.errors import LinkError
from meterlink.simulators.gnss import SimulatedGnss

# Dale DePriest, "NMEA data" (gpsinformation.org/dale/nmea.htm), GGA example, with its field notes:
# fix at 12:35:19 UTC, latitude 48 deg 07.038' N, longitude 11 deg 31.000' E, fix quality 1,
# 8 satellites, HDOP 0.9, altitude 545.4 m above mean sea level. Typed from the reproduction of that
# table on the University of Hohenheim "NMEA strings" wiki page (mpt-internal.uni-hohenheim.de).
DEPRIEST_GGA = "$GPGGA,123519,4807.038,N,01131.000,E,1,08,0.9,545.4,M,46.9,M,,*47"
# NOAA Physical Sciences Laboratory, PISTON 2019 cruise (R/V Sally Ride), raw GPS file
# flux/Raw/19259/gps01925920_raw.txt (downloads.psl.noaa.gov), the RMC and GGA of 19:59:59 UTC on
# 16 September 2019: a real receiver's output with 8-decimal minutes and a DGPS fix (quality 2).
NOAA_RMC = "$GPRMC,195959.00,A,1813.38282955,N,12606.12767097,E,1.31,262.13,160919,3.0,W,D*21"
NOAA_GGA = "$GPGGA,195959.00,1813.38282955,N,12606.12767097,E,2,07,1.4,17.2,M,36.5,M,4.0,0129*78"
# Cypress Solutions CTM-200 report message 80 ($GPGGA), documented example: west longitude,
# negative altitude (-15 m).
CYPRESS_GGA = "$GPGGA,000512.00,4910.9588,N,12254.6560,W,1,8,01.1,-00015,M,,M,,0000*5C"


def test_depriest_gga_fields():
    m = parse_sentence(DEPRIEST_GGA)
    assert m.msgID == "GGA"
    # hand-worked: 4807.038 = 48 deg + 7.038/60 = 48.1173 deg; 01131.000 = 11 + 31/60 = 11.516666... deg
    assert m.lat == pytest.approx(48.1173, abs=1e-9)
    assert m.lon == pytest.approx(11 + 31 / 60, abs=1e-9)
    assert (int(m.quality), int(m.numSV), float(m.HDOP), float(m.alt)) == (1, 8, 0.9, 545.4)
    assert (m.time.hour, m.time.minute, m.time.second) == (12, 35, 19)


def test_noaa_rmc_and_gga_fields():
    rmc, gga = parse_sentence(NOAA_RMC), parse_sentence(NOAA_GGA)
    assert rmc.msgID == "RMC" and rmc.status == "A"
    assert (rmc.date.year, rmc.date.month, rmc.date.day) == (2019, 9, 16)
    # hand-worked: 1813.38282955 = 18 + 13.38282955/60 = 18.2230471592 deg;
    # 12606.12767097 = 126 + 6.12767097/60 = 126.1021278495 deg
    for m in (rmc, gga):
        assert m.lat == pytest.approx(18.2230471592, abs=1e-10)
        assert m.lon == pytest.approx(126.1021278495, abs=1e-10)
    assert (int(gga.quality), int(gga.numSV), float(gga.HDOP), float(gga.alt)) == (2, 7, 1.4, 17.2)


def test_cypress_gga_west_and_negative_altitude():
    m = parse_sentence(CYPRESS_GGA)
    # hand-worked: 4910.9588 N = 49 + 10.9588/60 = 49.18264667 deg; 12254.6560 W = -(122 + 54.656/60) = -122.91093333
    assert m.lat == pytest.approx(49 + 10.9588 / 60, abs=1e-9)
    assert m.lon == pytest.approx(-(122 + 54.656 / 60), abs=1e-9)
    assert float(m.alt) == -15.0 and float(m.HDOP) == 1.1


@pytest.mark.parametrize("bad", [
    DEPRIEST_GGA.replace("*47", "*48"),                 # checksum off by one
    DEPRIEST_GGA.replace("4807.038", "4807.039"),        # a digit changed in transit
])
def test_bad_checksum_is_refused(bad):
    with pytest.raises(SentenceError) as e:
        parse_sentence(bad)
    assert e.value.kind == "bad_checksum"


def test_checksum_is_the_xor_between_dollar_and_star():
    # NMEA 0183: XOR of the characters between '$' and '*': the published sentences carry 47, 21 and 78
    assert nmea_checksum(DEPRIEST_GGA[1:-3]) == 0x47
    assert nmea_checksum(NOAA_RMC[1:-3]) == 0x21 and nmea_checksum(NOAA_GGA[1:-3]) == 0x78
    with pytest.raises(SentenceError) as e:
        parse_sentence(DEPRIEST_GGA[:-3])
    assert e.value.kind == "no_checksum"


def test_local_projection_hand_worked():
    # one arc-minute of latitude on a sphere of radius R: R * pi / 10800 = 1853.2513 m for R = 6371008.8 m
    # (the nautical mile, 1852 m, was defined close to it); at 60 deg latitude a minute of longitude is half that
    x, y = to_local_m(60 + 1 / 60, 10 + 1 / 60, 60.0, 10.0)
    assert float(y) == pytest.approx(1853.2513, abs=1e-3)
    assert float(x) == pytest.approx(926.6257, abs=1e-3)
    assert EARTH_RADIUS_M == 6371008.8
    lat, lon = from_local_m(x, y, 60.0, 10.0)
    assert (float(lat), float(lon)) == pytest.approx((60 + 1 / 60, 10 + 1 / 60), abs=1e-12)


def _wait(cond, timeout_s=10.0):
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if cond():
            return True
        time.sleep(0.01)
    return False


def test_link_reads_fixes_and_counts_faults_on_a_pty():
    t0 = time.monotonic()
    clock = lambda: (time.monotonic() - t0) * 20          # noqa: E731 - 20 fixes a second
    with SimulatedGnss(lambda: (1852.0, 0.0, 1.5), clock, origin=(0.0, 0.0, 100.0)) as g, GnssLink(g.port) as link:
        assert _wait(lambda: link.latest() is not None)
        f = link.latest()
        # on the equator 1852 m east is 1852 / (R pi / 10800) = 0.99932 arc-minutes of longitude
        assert f.lon_deg == pytest.approx(1852.0 / 1853.2513 / 60, abs=2e-7)
        assert f.lat_deg == pytest.approx(0.0, abs=1e-7)
        assert f.alt_m == pytest.approx(101.5) and f.quality == 1 and f.hdop == 0.9
        assert f.accuracy_m == pytest.approx(0.9 * UERE_M)
        assert f.fix_utc is not None and abs(f.fix_utc - time.time()) < 3600
        g.garbage = True
        assert _wait(lambda: link.stats.bad_checksum >= 10)
        n_fix = link.stats.fixes
        g.garbage = False
        g.no_fix = True
        assert _wait(lambda: link.latest(max_age_s=None) is None)
        g.no_fix = False
        assert _wait(lambda: link.latest() is not None)
        assert link.stats.fixes > n_fix
        g.vanish(0.3)
        assert _wait(lambda: link.stats.port_losses == 1 and link.stats.reconnects == 1)
        assert _wait(lambda: link.latest() is not None)
        kinds = [e.kind for e in link.events()]
    for k in ("gnss_bad_sentences", "gnss_no_fix", "gnss_fix", "gnss_lost", "gnss_reconnected"):
        assert k in kinds
    assert not math.isnan(link.stats.sentences)


def test_missing_port_is_a_one_line_error(tmp_path):
    with pytest.raises(LinkError, match="GNSS receiver: cannot open port") as e:
        GnssLink(str(tmp_path / "no-such-receiver")).start()
    assert "\n" not in str(e.value)


def _fix(t_s, x_m, y_m):
    lat, lon = from_local_m(x_m, y_m, 0.0, 0.0)
    return Fix(t_s, float(lat), float(lon), 100.0 + t_s - 1000.0, 1, 8, 0.9, 0.0)


def test_position_interpolated_between_the_fixes_around_a_time():
    track = [_fix(1000.0, 0.0, 0.0), _fix(1001.0, 2.0, 0.0), _fix(1004.0, 2.0, 6.0)]
    # 2 m east in 1 s: at 1000.25 s a quarter of the way, 0.5 m east, altitude 100.25 m; accuracy
    # sqrt((0.9 x 5)^2 + (2 m/s x 0.25 s)^2 + (2 m/s x 0.1 s)^2) = sqrt(20.25 + 0.25 + 0.04) = 4.53211 m
    p = position_on_track(track, 1000.25, max_gap_s=2.0, timing_u_s=0.1)
    x, y = to_local_m(p.lat_deg, p.lon_deg, 0.0, 0.0)
    assert float(x) == pytest.approx(0.5, abs=1e-6) and float(y) == pytest.approx(0.0, abs=1e-6)
    assert p.alt_m == pytest.approx(100.25) and p.fix_utc == 1000.25 and p.gap_s == 1.0
    assert p.accuracy_m == pytest.approx(4.53211, abs=1e-5)
    # on a fix: that fix, its own accuracy 4.5 m
    p = position_on_track(track, 1001.0, max_gap_s=2.0, timing_u_s=0.1)
    assert p.accuracy_m == pytest.approx(4.5) and p.gap_s == 0.0
    # the fixes 3 s apart bridge no more than 2 s: 0.4 s after one, that fix, hypot(4.5, 2 x 0.4) =
    # 4.57056 m; 1.5 s from both, no position; 0.5 s before the first, the first (hypot(4.5, 1) = 4.60977)
    p = position_on_track(track, 1001.4, max_gap_s=2.0)
    x, y = to_local_m(p.lat_deg, p.lon_deg, 0.0, 0.0)
    assert float(x) == pytest.approx(2.0, abs=1e-6) and p.accuracy_m == pytest.approx(4.57056, abs=1e-5)
    assert position_on_track(track, 1002.5, max_gap_s=2.0) is None
    assert position_on_track(track, 999.5, max_gap_s=2.0).accuracy_m == pytest.approx(4.60977, abs=1e-5)
    assert position_on_track(track, 1006.0, max_gap_s=2.0) is None
    assert position_on_track([], 1000.0, max_gap_s=2.0) is None


def test_offset_is_the_median_and_its_spread_the_scaled_mad():
    # arrivals minus fix times 0.30, 0.31, 0.29, 0.32, 2.5 (one late): median 0.31; absolute
    # deviations 0.01, 0, 0.02, 0.01, 2.19 -> MAD 0.01, spread 1.4826 x 0.01 = 0.014826 s
    off = estimate_offset([0.30, 0.31, 0.29, 0.32, 2.5])
    assert off.offset_s == pytest.approx(0.31) and off.spread_s == pytest.approx(0.014826) and off.n == 5
    assert estimate_offset([]) is None


def test_a_jump_between_fixes_is_not_interpolated():
    # 100 m in 1 s is faster than the 30 m/s a carrier is taken to move: a reading 0.25 s after the
    # first fix is placed at it, not 25 m along; accuracy hypot(4.5, 0.25 x 100) = 25.4018 m (by hand)
    track = [_fix(1000.0, 0.0, 0.0), _fix(1001.0, 100.0, 0.0)]
    p = position_on_track(track, 1000.25, max_gap_s=2.0)
    x, _ = to_local_m(p.lat_deg, p.lon_deg, 0.0, 0.0)
    assert float(x) == pytest.approx(0.0, abs=1e-6) and p.accuracy_m == pytest.approx(25.4018, abs=1e-4)
    p = position_on_track(track, 1000.8, max_gap_s=2.0)
    x, _ = to_local_m(p.lat_deg, p.lon_deg, 0.0, 0.0)
    assert float(x) == pytest.approx(100.0, abs=1e-6) and p.accuracy_m == pytest.approx(20.5, abs=1e-6)   # hypot(4.5, 20)

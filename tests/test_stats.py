"""Period statistics on a synthetic 6-minute series with answers worked by hand.

Percentile definition: Hyndman & Fan (1996), "Sample quantiles in statistical packages",
Am. Stat. 50(4), definition 7 (h = (n-1)p, linear between order statistics), which is also
numpy's default and the spreadsheet PERCENTILE.INC.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from meterlink.station.stats import Reference, period_stats, profiles, quantile7, sparkline
from meterlink.physics.units import Z0_OHM

DAY = 86400.0
T0 = 1_704_067_200.0        # 2024-01-01T00:00:00Z, a Monday


def test_quantile7_by_hand():
    x = [4, 1, 3, 2, 10]     # sorted 1 2 3 4 10
    assert quantile7(x, 0.5) == 3
    # p95: h = 4 * 0.95 = 3.8 -> x(4) + 0.8 (x(5) - x(4)) = 4 + 0.8 * 6 = 8.8
    assert quantile7(x, 0.95) == pytest.approx(8.8)
    assert quantile7([1, 2, 3, 4], 0.5) == 2.5
    assert quantile7(x, 0.95) == pytest.approx(np.percentile(x, 95))


def test_day_statistics_field_convention():
    ref = Reference("icnirp-2020", "public", 27.7, 2.0, "field")
    # day 1: 240 complete blocks, values 1..240 V/m / 10; day 2: 120 blocks, half covered
    t = T0 + 360.0 * np.arange(240)
    e = np.arange(1, 241) / 10.0
    t2 = T0 + DAY + 360.0 * np.arange(120)
    e2 = np.full(120, 2.0)
    tt, ee = np.concatenate([t, t2]), np.concatenate([e, e2])
    cov = np.full(tt.size, 360.0)
    ok = np.ones(tt.size, bool)
    rows = period_stats(ref, tt, ee, cov, ok, T0, T0 + 2 * DAY, "day")
    d1, d2 = rows
    assert d1["period"] == "2024-01-01" and d1["coverage"] == pytest.approx(1.0)
    assert d2["coverage"] == pytest.approx(0.5)
    assert d1["max_e_v_per_m"] == pytest.approx(24.0) and d1["min_e_v_per_m"] == pytest.approx(0.1)
    # median of 0.1 .. 24.0 (240 values): (12.0 + 12.1) / 2 = 12.05
    assert d1["median_e_v_per_m"] == pytest.approx(12.05)
    # p95: h = 239 * 0.95 = 227.05 -> 22.8 + 0.05 * 0.1 = 22.805
    assert d1["p95_e_v_per_m"] == pytest.approx(22.805)
    assert d1["max_pct"] == pytest.approx(100 * 24.0 / 27.7)
    week = period_stats(ref, tt, ee, cov, ok, T0, T0 + 2 * DAY, "week")
    assert len(week) == 1 and week[0]["period"] == "2024-W01" and week[0]["n_blocks"] == 360


def test_power_convention_takes_order_statistics_of_s():
    ref = Reference("icnirp-2020", "public", 27.7, 2.0, "power")
    e = np.array([1.0, 2.0, 3.0, 4.0])
    t = T0 + 360.0 * np.arange(4)
    rows = period_stats(ref, t, e, np.full(4, 360.0), np.ones(4, bool), T0, T0 + DAY, "day")
    # median of S = E^2/Z0 over {1, 4, 9, 16}/Z0 is 6.5/Z0, i.e. E = sqrt(6.5), not 2.5
    assert rows[0]["median_e_v_per_m"] == pytest.approx(math.sqrt(6.5))
    assert rows[0]["median_pct"] == pytest.approx(100 * 6.5 / Z0_OHM / 2.0)


def test_profiles_hour_and_weekend():
    ref = Reference("x", "public", 10.0, 1.0, "field")
    t = T0 + 360.0 * np.arange(7 * 240)           # Monday .. Sunday
    hour = ((t - T0) // 3600) % 24
    day = (t - T0) // DAY
    e = np.where(hour == 12, 3.0, 1.0) * np.where(day >= 5, 2.0, 1.0)
    p = profiles(ref, t, e, np.ones(t.size, bool))
    h = p["hour_of_day"]
    # hour 12: power mean of 5 weekdays at 3 and 2 weekend days at 6: sqrt((5*9 + 2*36)/7)
    assert h[12]["mean_e_v_per_m"] == pytest.approx(math.sqrt((5 * 9 + 2 * 36) / 7))
    assert h[0]["n_blocks"] == 70
    assert p["weekday_weekend"]["weekend"]["n_blocks"] == 480
    assert p["weekday_weekend"]["weekend"]["max_e_v_per_m"] == pytest.approx(6.0)
    line = sparkline([x["mean_e_v_per_m"] for x in h])
    assert len(line) == 24 and line[12] == "█"

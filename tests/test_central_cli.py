"""meterlink central's admin actions as a reader types them (docs/network.md, "Setting up"), on a
database of their own in the real PostgreSQL server: the station list gives its newest block's start
as ISO 8601 UTC (docs/formats.md: times a person reads), not the store's epoch seconds."""

from __future__ import annotations

import subprocess
import sys

from test_central_support import ROOT, central_database, write_central_config


def _cli(*args) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "meterlink", "central", *args], capture_output=True,
                          text=True, cwd=ROOT, timeout=60)


def test_station_list_gives_the_newest_block_in_iso_utc(tmp_path):
    import psycopg

    from meterlink.network.central_schema import Partitions

    with central_database() as dsn:
        cfg = write_central_config(tmp_path / "central.toml", dsn, 8600)
        added = _cli("station-add", "North ridge", "--config", str(cfg))
        assert added.returncode == 0, added.stderr
        station_uuid = added.stdout.strip()
        listed = _cli("stations", "--config", str(cfg))
        assert listed.returncode == 0, listed.stderr
        assert "North ridge" in listed.stdout and "newest block" in listed.stdout
        assert "newest block                    -" in listed.stdout      # no block yet
        # 1796400000 s after the Unix epoch is 2026-12-04T16:00:00Z (GNU date -u -d @1796400000)
        with psycopg.connect(dsn, autocommit=True) as c, c.transaction():
            Partitions().ensure(c, "blocks", [1796400000.0])
            c.execute("INSERT INTO blocks (station_uuid, meter, band, t_start_utc, block_s, energy, covered_s, n, "
                      "e_rms_v_per_m, e_max_v_per_m, complete, n_overrange, file_uuid, received_utc) VALUES "
                      "(%s, 'm1', 'total', 1796400000.0, 360, 0, 360, 36, 7.5, 8.0, true, 0, gen_random_uuid(), 0)",
                      (station_uuid,))
        listed = _cli("stations", "--config", str(cfg))
        assert listed.returncode == 0, listed.stderr
        line = next(x for x in listed.stdout.splitlines() if station_uuid in x)
        assert "newest block 2026-12-04T16:00:00Z" in line and "7.5 V/m" in line
        assert "1796400000" not in line

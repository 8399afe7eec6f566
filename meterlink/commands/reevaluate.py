"""``meterlink reevaluate``: a stored frequency-selective point computed again from its stored sweeps with
another antenna certificate (read only: the stored point is not changed)."""

from __future__ import annotations

HELP = "compute a stored frequency-selective point again from its sweeps with another antenna certificate"


def add_arguments(parser) -> None:
    parser.add_argument("--db", metavar="FILE", required=True, help="database holding the point (sel_points)")
    parser.add_argument("--point", metavar="ID", type=int, required=True, help="sel_points.id of the point")
    parser.add_argument("--antenna-cert", metavar="CERT", required=True,
                        help="antenna certificate (meterlink-cert/1, kind dipole-receiver): file or packaged name")
    parser.add_argument("--json", action="store_true", help="print the result as JSON")


def run(args) -> int:
    import json
    import math

    import numpy as np

    from meterlink.cautions import SAFETY_LINE
    from meterlink.errors import MeterlinkError
    from meterlink.physics.exposure import multi_frequency
    from meterlink.storage.store import Store
    from meterlink.survey.selective_point import antenna_certificate
    from meterlink.survey.selstore import reevaluate

    cert = antenna_certificate(args.antenna_cert)
    from pathlib import Path
    if not Path(args.db).is_file():
        raise MeterlinkError(f"database {args.db!r} does not exist")
    with Store(args.db, readonly=True) as store:
        rows = reevaluate(store, args.point, cert, args.antenna_cert)
        sp = dict(next(store.db["sel_points"].rows_where("id = ?", [args.point])))
    f = np.array([r["freq_hz"] for r in rows])
    mf = multi_frequency(f, standard=sp["standard"], tier=sp["tier"], e_v_per_m=np.array([r["e_v_per_m"] for r in rows]),
                         labels=[r["name"] for r in rows])
    for r in rows:
        r["change_db"] = 20 * math.log10(r["e_v_per_m"] / r["e_stored_v_per_m"])
    out = {"point_id": args.point, "label": sp["label"], "antenna_stored": sp["antenna_name"],
           "antenna": args.antenna_cert, "standard": sp["standard"], "tier": sp["tier"],
           "total_exposure_ratio_stored": sp["total_exposure_ratio"], "total_exposure_ratio": float(mf.total),
           "bands": rows, "cautions": SAFETY_LINE}
    if args.json:
        print(json.dumps(out))
        return 0
    print(f"point {args.point} {sp['label']!r}: stored with {sp['antenna_name']}, computed again with {args.antenna_cert}")
    print(f"{'band':18s} {'f/MHz':>9s} {'E stored':>9s} {'E now':>9s} {'change/dB':>9s}")
    for r in rows:
        print(f"{r['name'][:18]:18s} {r['freq_hz'] / 1e6:9.3f} {r['e_stored_v_per_m']:9.3f} {r['e_v_per_m']:9.3f} "
              f"{r['change_db']:+9.2f}")
    print(f"total exposure ratio ({sp['standard']} {sp['tier']}): {sp['total_exposure_ratio']:.4f} stored, "
          f"{mf.total:.4f} now (not stored)")
    print(SAFETY_LINE)
    return 0

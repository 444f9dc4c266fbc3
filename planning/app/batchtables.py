"""A batch's tables: batch.csv (one row per photo), batch.json (rows and totals) and the report."""

from __future__ import annotations

from pathlib import Path

from gripsight.app.fileio import strict_json, write_text_atomic

__all__ = ["write_batch_tables"]


def write_batch_tables(out, rows: list[dict], cell) -> dict:
    """batch.csv (one row per photo), batch.json (rows and totals) and report.html; returns the totals."""
    import csv
    import io

    from gripsight.app.report import write_report
    from gripsight.app.textsafe import one_line

    classes = list(cell.parts) + ["unknown"]
    reasons = sorted({r for row in rows for r in row["rejected"]})
    header = (["photo", "status", "error", "registration", "drift", "parts"] + [f"found_{c}" for c in classes]
              + ["planned", "rejected"] + [f"rejected_{r}" for r in reasons]
              + ["cycle_s", "truth_recall", "truth_precision", "pick_error_rms_mm", "pick_error_max_mm", "warnings"])
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(header)
    for row in rows:
        t = row["truth"] or {}
        w.writerow([one_line(row["photo"]), row["status"], one_line(row["error"]), row["registration"], row["drift"], row["parts"]]
                   + [row["found"].get(c, 0) for c in classes]
                   + [row["planned"], sum(row["rejected"].values())] + [row["rejected"].get(r, 0) for r in reasons]
                   + [row["cycle_s"], t.get("recall", ""), t.get("precision", ""), t.get("pick_error_rms_mm", ""),
                      t.get("pick_error_max_mm", ""), "; ".join(row.get("warnings", []))])
    totals = _totals(rows)
    write_text_atomic(Path(out) / "batch.csv", buf.getvalue())
    clean = [{k: v for k, v in r.items() if k not in ("thumbnail", "photo_sha256", "cell_sha256", "calibration_sha256")}
             for r in rows]
    write_text_atomic(Path(out) / "batch.json", strict_json({"cell": cell.cell, "totals": totals, "photos": clean},
                                                           indent=1) + "\n")
    write_report(Path(out) / "report.html", rows, totals, cell)
    return totals


def _totals(rows: list[dict]) -> dict:
    totals = {"photos": len(rows), "ok": sum(r["status"] == "ok" for r in rows),
              "refused": sum(r["status"] == "refused" for r in rows), "errors": sum(r["status"] == "error" for r in rows),
              "parts": sum(r["parts"] for r in rows), "planned": sum(r["planned"] for r in rows),
              "rejected": {}, "found": {}, "cycle_s": round(sum(r["cycle_s"] for r in rows), 3),
              "warned": sum(bool(r.get("warnings")) for r in rows),
              "camera_moved": sum(r["registration"] == "refit" for r in rows),
              "markers_unseen": sum(any(w.startswith("markers not seen") for w in r.get("warnings", [])) for r in rows),
              "poor_calibration": sum(any("is poor" in w for w in r.get("warnings", [])) for r in rows)}
    for r in rows:
        for k, v in r["rejected"].items():
            totals["rejected"][k] = totals["rejected"].get(k, 0) + v
        for k, v in r["found"].items():
            totals["found"][k] = totals["found"].get(k, 0) + v
    truths = [r["truth"] for r in rows if r["truth"]]
    if truths:
        expected = sum(t["expected"] for t in truths)
        found = sum(t["found"] for t in truths)
        reported = sum(t["reported_ok"] for t in truths)
        sq = sum(t["pick_error_rms_mm"] ** 2 * t["found"] for t in truths)
        totals["truth"] = {"photos": len(truths), "expected": expected, "found": found,
                           "recall": round(found / expected, 4) if expected else 1.0,
                           "precision": round(found / reported, 4) if reported else 1.0,
                           "pick_error_rms_mm": round((sq / found) ** 0.5, 3) if found else 0.0,
                           "pick_error_max_mm": max(t["pick_error_max_mm"] for t in truths)}
    return totals

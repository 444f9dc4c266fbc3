"""report.html: one self-contained page (inline style, inline SVG chart, thumbnails embedded) that shows
what a batch decided: summary counts, reject reasons, and one row per photo linked to its overlay."""

from __future__ import annotations

import html
from pathlib import Path
from urllib.parse import quote

from gripsight.app.fileio import write_text_atomic

__all__ = ["write_report"]

_STYLE = """
body{font-family:system-ui,sans-serif;margin:24px;color:#1d232a;background:#fafafa}
h1{font-size:22px;margin:0 0 4px} h2{font-size:17px;margin:24px 0 8px}
.cards{display:flex;gap:12px;flex-wrap:wrap}
.card{background:#fff;border:1px solid #d8dde3;border-radius:6px;padding:10px 14px;min-width:110px}
.card b{display:block;font-size:22px}
table{border-collapse:collapse;background:#fff;font-size:13px}
th,td{border:1px solid #d8dde3;padding:4px 8px;text-align:left;vertical-align:middle}
th{background:#eef1f4} td.num{text-align:right}
tr.error td{background:#fdecec} tr.refused td{background:#fff6e0}
img.thumb{width:200px;display:block}
.muted{color:#66707a;font-size:12px}
"""


def _bar_chart(counts: dict, width: int = 520) -> str:
    if not counts:
        return '<p class="muted">No part was rejected.</p>'
    items = sorted(counts.items(), key=lambda kv: -kv[1])
    top = max(v for _, v in items)
    bar_h, gap, label_w = 20, 6, 190
    height = len(items) * (bar_h + gap)
    rows = []
    for i, (name, n) in enumerate(items):
        y = i * (bar_h + gap)
        w = int((width - label_w - 50) * n / top)
        rows.append(f'<text x="{label_w - 6}" y="{y + 15}" text-anchor="end" font-size="12">{html.escape(name)}</text>'
                    f'<rect x="{label_w}" y="{y}" width="{w}" height="{bar_h}" fill="#c0504d"/>'
                    f'<text x="{label_w + w + 6}" y="{y + 15}" font-size="12">{n}</text>')
    return (f'<svg id="reasons-chart" width="{width}" height="{height}" role="img" '
            f'aria-label="reject reasons">{"".join(rows)}</svg>')


def _pictures_note(rows: list[dict]) -> str:
    without = sum(1 for r in rows if r.get("thumbnail") and not r.get("overlay", True))
    if not without:
        return "Click a thumbnail for the full overlay."
    return (f"Click a thumbnail for the full overlay: drawn for photos with a rejected part or a refused photo, "
            f"and for a sample of the rest; {without} photos have a thumbnail of the parts found only "
            "(run the batch with --pictures all for every overlay).")


def _warning_line(totals: dict) -> str:
    if not totals.get("warned"):
        return ""
    return (f'<p id="warnings-summary"><b>{totals["warned"]} photos with warnings</b>: camera moved (refitted) in '
            f'{totals.get("camera_moved", 0)}, markers not seen in {totals.get("markers_unseen", 0)}, poor calibration in '
            f'{totals.get("poor_calibration", 0)}; see the warnings column.</p>')


def write_report(path, rows: list[dict], totals: dict, cell) -> None:
    """Write report.html beside the per-photo folders (links to ``<photo>/overlay.png`` are relative)."""
    e = html.escape
    cards = [("photos", totals["photos"]), ("planned picks", totals["planned"]), ("parts found", totals["parts"]),
             ("rejected", sum(totals["rejected"].values())), ("refused photos", totals["refused"]),
             ("failed photos", totals["errors"]), ("photos with warnings", totals.get("warned", 0)),
             ("cycle time s", f"{totals['cycle_s']:.1f}")]
    truth = totals.get("truth")
    if truth:
        cards += [("recall", f"{truth['recall']:.1%}"), ("precision", f"{truth['precision']:.1%}"),
                  ("pick error RMS mm", f"{truth['pick_error_rms_mm']:.2f}"),
                  ("pick error max mm", f"{truth['pick_error_max_mm']:.2f}")]
    card_html = "".join(f'<div class="card"><b>{e(str(v))}</b>{e(k)}</div>' for k, v in cards)
    classes = list(cell.parts) + ["unknown"]
    head = "".join(f"<th>{e(h)}</th>" for h in ["photo", "overlay", "status", *classes, "planned", "rejected (reasons)",
                                               "cycle s", "warnings"] + (["recall", "pick error mm"] if truth else []))
    body = []
    for r in rows:
        link = f"{quote(r['photo'], errors='surrogateescape')}/overlay.png"      # a name's own bytes, as on disk
        img = (f'<img class="thumb" alt="overlay of {e(r["photo"])}" src="data:image/jpeg;base64,{r["thumbnail"]}">'
               if r.get("thumbnail") else "")
        if img and r.get("overlay", True):
            thumb = f'<a href="{e(link)}">{img}</a>'
        elif img:
            thumb = f'{img}<span class="muted">parts found; no overlay.png (see above)</span>'
        else:
            thumb = ""
        reasons = ", ".join(f"{k} {v}" for k, v in sorted(r["rejected"].items()))
        status = r["status"] + (f": {r['error']}" if r["error"] else "")
        cells = [f"<td>{e(r['photo'])}</td>", f"<td>{thumb}</td>", f"<td>{e(status)}</td>"]
        cells += [f'<td class="num">{r["found"].get(c, 0)}</td>' for c in classes[:-1]]
        why = "".join(f'<br><span class="muted">{e(line)}</span>' for line in r.get("unknown", []))   # reject bin
        cells.append(f'<td class="num">{r["found"].get("unknown", 0)}{why}</td>')
        cells += [f'<td class="num">{r["planned"]}</td>', f"<td>{e(reasons)}</td>", f'<td class="num">{r["cycle_s"]:.1f}</td>',
                  f"<td>{e('; '.join(r.get('warnings', [])))}</td>"]
        if truth:
            t = r["truth"] or {}
            cells += [f'<td class="num">{t.get("recall", "")}</td>',
                      f'<td class="num">{t.get("pick_error_rms_mm", "")} / {t.get("pick_error_max_mm", "")}</td>']
        body.append(f'<tr class="{e(r["status"])}">{"".join(cells)}</tr>')
    truth_note = (f'<p class="muted">Against {truth["photos"]} truth files: recall = parts found with the right class '
                  "/ parts fully in view inside the work area; pick error = distance from the planned pick point to "
                  "the true footprint centre (RMS / max).</p>" if truth else "")
    page = f"""<!doctype html>
<html lang="en"><head><meta charset="utf-8"><title>gripsight batch report: {e(cell.cell)}</title>
<style>{_STYLE}</style></head><body>
<h1>Batch report: {e(cell.cell)}</h1>
<p class="muted">Every photo planned on its own, arm starting at home. {e(_pictures_note(rows))}</p>
<section id="summary"><h2>Summary</h2><div class="cards">{card_html}</div>{truth_note}{_warning_line(totals)}</section>
<section id="reasons"><h2>Why parts were rejected</h2>{_bar_chart(totals["rejected"])}</section>
<section id="photos"><h2>Photos</h2><table id="photo-table"><thead><tr>{head}</tr></thead>
<tbody>{"".join(body)}</tbody></table></section>
</body></html>
"""
    write_text_atomic(Path(path), page)

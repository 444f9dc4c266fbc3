"""A printable sheet of the layout's markers at true size, drawn as vector cells (crisp at any printer).

Each marker is drawn with its white margin, its id and, for a raised marker, the riser height; each
page carries a 100 mm scale bar and the instruction to measure it after printing.
"""

from __future__ import annotations

from pathlib import Path

from gripsight.vision.markerdict import aruco_dictionary

__all__ = ["PAPER_MM", "write_marker_sheet", "page_layout"]

PAPER_MM = {"a4": (210.0, 297.0), "letter": (215.9, 279.4)}
_PAGE_MARGIN_MM = 10.0
_GAP_MM = 5.0
_LABEL_MM = 9.0
_FOOTER_MM = 28.0


def page_layout(cell, paper: str) -> list[list[tuple[int, float, float]]]:
    """Pages of (marker id, left mm, top mm) for each marker's paper square (size + 2 margins)."""
    width, height = PAPER_MM[paper]
    cell_mm = max(_marker_paper_mm(cell, None), _marker_paper_mm(cell, cell.markers.on_gripper))
    cols = max(1, int((width - 2 * _PAGE_MARGIN_MM + _GAP_MM) // (cell_mm + _GAP_MM)))
    rows = max(1, int((height - 2 * _PAGE_MARGIN_MM - _FOOTER_MM + _GAP_MM) // (cell_mm + _LABEL_MM + _GAP_MM)))
    if cell_mm > width - 2 * _PAGE_MARGIN_MM or cell_mm + _LABEL_MM > height - 2 * _PAGE_MARGIN_MM - _FOOTER_MM:
        from gripsight.app.errors import GripsightError

        table_mm = _marker_paper_mm(cell, None)
        key = "markers.size_mm" if table_mm >= cell_mm else "markers.on_gripper.size_mm"
        raise GripsightError(f"{key}: a {cell_mm:g} mm marker with its margin does not fit on {paper} paper")
    ids = sorted(cell.markers.layout) + ([cell.markers.on_gripper.id] if cell.markers.on_gripper else [])
    per_page = cols * rows
    pages = []
    for start in range(0, len(ids), per_page):
        page = []
        for k, marker_id in enumerate(ids[start:start + per_page]):
            r, c = divmod(k, cols)
            page.append((marker_id, _PAGE_MARGIN_MM + c * (cell_mm + _GAP_MM),
                         _PAGE_MARGIN_MM + r * (cell_mm + _LABEL_MM + _GAP_MM)))
        pages.append(page)
    return pages


def _marker_paper_mm(cell, gripper) -> float:
    """Side of a marker's paper (black square and margins): a table marker's, or the gripper marker's."""
    if gripper is None:
        return cell.markers.size_mm + 2 * cell.markers.margin_mm
    return gripper.size_mm + 2 * gripper.margin_mm


def _draw_page(fig, cell, paper, page, page_no, n_pages):
    import cv2
    import matplotlib.patches as patches

    width, height = PAPER_MM[paper]
    ax = fig.add_axes([0, 0, 1, 1])
    ax.set_xlim(0, width)
    ax.set_ylim(height, 0)                  # mm from the top-left corner of the page
    ax.axis("off")
    size, margin = cell.markers.size_mm, cell.markers.margin_mm
    dictionary = aruco_dictionary(cell.markers.dictionary)
    gripper = cell.markers.on_gripper
    for marker_id, left, top in page:
        on_gripper = gripper is not None and marker_id == gripper.id and marker_id not in cell.markers.layout
        size, margin = (gripper.size_mm, gripper.margin_mm) if on_gripper else (cell.markers.size_mm, cell.markers.margin_mm)
        bits = dictionary.markerSize + 2
        cells = cv2.aruco.generateImageMarker(dictionary, int(marker_id), bits, borderBits=1)
        cell_mm = size / bits
        ax.add_patch(patches.Rectangle((left, top), size + 2 * margin, size + 2 * margin, fill=False,
                                       ec="0.75", lw=0.3, ls=(0, (2, 2))))      # cut line
        x0, y0 = left + margin, top + margin
        for r in range(bits):
            for c in range(bits):
                if cells[r, c] < 128:
                    ax.add_patch(patches.Rectangle((x0 + c * cell_mm, y0 + r * cell_mm), cell_mm, cell_mm,
                                                   fc="black", ec="black", lw=0.05))
        if on_gripper:
            f, left_mm, up = gripper.offset_mm
            label = f"id {marker_id}  on the gripper, ({f:g}, {left_mm:g}, {up:g}) mm from the tool"
        else:
            placement = cell.markers.layout[marker_id]
            label = f"id {marker_id}  ({placement.x:g}, {placement.y:g}) mm"
            if placement.yaw_deg:
                label += f"  yaw {placement.yaw_deg:g}°"
            if placement.z:
                label += f"  on a {placement.z:g} mm riser"
        ax.text(left + (size + 2 * margin) / 2, top + size + 2 * margin + 2.0, label, ha="center", va="top", fontsize=6.5)
        ax.annotate("", xy=(x0 + size / 2, y0 - 0.5 * margin + 1.5), xytext=(x0 + size / 2, y0 - 1.0),
                    arrowprops=dict(arrowstyle="-|>", lw=0.4, color="0.5"))
    # scale bar and instruction
    bar_y = height - _PAGE_MARGIN_MM - 12.0
    ax.add_patch(patches.Rectangle((_PAGE_MARGIN_MM, bar_y), 100.0, 3.0, fc="black"))
    for k in range(0, 101, 10):
        ax.plot([_PAGE_MARGIN_MM + k, _PAGE_MARGIN_MM + k], [bar_y - (2.5 if k % 50 == 0 else 1.2), bar_y],
                color="black", lw=0.4)
    ax.text(_PAGE_MARGIN_MM, bar_y + 5.0,
            "This bar must measure exactly 100 mm. Measure it after printing; if it does not, print again at "
            "100 % ('actual size').", fontsize=7, va="top")
    ax.text(_PAGE_MARGIN_MM, bar_y + 9.0,
            f"{cell.cell}: {cell.markers.dictionary}, black square {cell.markers.size_mm:g} mm. Lay each marker with the small "
            "arrow (top edge) toward +x, its centre at the given table coordinates.", fontsize=6, va="top")
    ax.text(width - _PAGE_MARGIN_MM, _PAGE_MARGIN_MM / 2, f"page {page_no}/{n_pages}", ha="right", fontsize=6)


def write_marker_sheet(cell, out_path, paper: str = "a4", dpi: int = 300) -> list:
    """Write the sheet: one multi-page PDF, or one PNG per page (``sheet.png``, ``sheet_2.png``, ...).

    Returns the paths written.
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from matplotlib.backends.backend_pdf import PdfPages

    from gripsight.app.fileio import atomic_output

    out_path = Path(out_path)
    width, height = PAPER_MM[paper]
    pages = page_layout(cell, paper)
    written = []
    if out_path.suffix.lower() == ".pdf":
        with atomic_output(out_path) as tmp, PdfPages(tmp) as pdf:
            for i, page in enumerate(pages, 1):
                fig = plt.figure(figsize=(width / 25.4, height / 25.4))
                _draw_page(fig, cell, paper, page, i, len(pages))
                pdf.savefig(fig)
                plt.close(fig)
        written.append(out_path)
    else:
        for i, page in enumerate(pages, 1):
            path = out_path if i == 1 else out_path.with_name(f"{out_path.stem}_{i}{out_path.suffix}")
            fig = plt.figure(figsize=(width / 25.4, height / 25.4))
            _draw_page(fig, cell, paper, page, i, len(pages))
            with atomic_output(path) as tmp:
                fig.savefig(tmp, dpi=dpi)
            plt.close(fig)
            written.append(path)
    return written


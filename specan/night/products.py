"""The night's own products beside the catalogue: the night diagram and the HTML report."""

from __future__ import annotations

import traceback
from pathlib import Path

from .files import atomic_path, inside

__all__ = ["write_night_products", "NightRows"]


def write_night_products(catalogue, out, stages):
    """Night diagram and HTML report; a failure here costs a note, not the catalogue.

    Parameters
    ----------
    catalogue : astropy.table.Table
        The night catalogue as written.
    out : pathlib.Path
        Output folder.
    stages : dict
        Stage -> None if it ran, else why it did not (shown in the report).

    Returns
    -------
    outputs : dict
        ``night_diagram`` and ``report`` -> path, for those written.
    notes : list of str
        How the diagram was drawn, and what could not be written and why.
    """
    def page(tmp, diagram):
        from ..report import write_report

        write_report(catalogue, out, tmp, diagram=diagram, stages=stages)

    return _products(out, catalogue, page)


def _products(out, diagram_source, write_page):
    """Draw the diagram from ``diagram_source``, then ``write_page(tmp, diagram)``; (outputs, notes)."""
    outputs, notes = {}, []
    diagram = inside(out, Path("night_diagram.png"))
    try:
        from ..plots import night_diagram

        with atomic_path(diagram) as tmp:
            how = night_diagram(diagram_source, tmp)
        outputs["night_diagram"] = diagram
        if how:
            notes.append(how)
    except Exception as exc:  # noqa: BLE001
        notes.append(f"night diagram not drawn: {type(exc).__name__}: {exc}")
    try:
        target = inside(out, Path("report.html"))
        with atomic_path(target) as tmp:
            write_page(tmp, outputs.get("night_diagram"))
        outputs["report"] = target
    except Exception as exc:  # noqa: BLE001
        notes.append(f"report not written: {type(exc).__name__}: {exc}\n{traceback.format_exc()}")
    return outputs, notes


class NightRows:
    """The report's rows and the diagram's stars, taken a chunk of catalogue rows at a time.

    The report's rows go to temporary files as they come (one per report group, see
    :class:`specan.report.ReportRows`), the diagram keeps a few numbers per star
    (:class:`specan.hrdiagram.HRPoints`): a night of any size is written with the
    memory of one chunk.

    Parameters
    ----------
    out : pathlib.Path
        Output folder (the figures the rows link to are in it).
    columns : astropy.table.Table
        The catalogue with no rows (its columns and units).
    """

    def __init__(self, out, columns):
        from ..hrdiagram import HRPoints
        from ..report import ReportRows

        self.out = Path(out)
        self.rows = ReportRows(self.out, columns)
        self.points = HRPoints()

    def add(self, chunk, first_index):
        """Take a chunk of catalogue rows; ``first_index`` is the input number of its first row."""
        self.rows.add(chunk, first_index)
        self.points.add(chunk)

    def write_products(self, night, stages):
        """Night diagram and report page; (outputs, notes) as :func:`write_night_products`."""
        def page(tmp, diagram):
            from ..report import write_report_page

            write_report_page(tmp, self.rows, night, stages=stages, diagram=diagram)

        return _products(self.out, self.points, page)

    def close(self):
        """Drop the temporary row files."""
        self.rows.close()

"""The night's own products beside the catalogue: the night diagram and the HTML report."""

from __future__ import annotations

import traceback
from pathlib import Path

from .files import atomic_path, inside

__all__ = ["write_night_products"]


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
    outputs, notes = {}, []
    diagram = inside(out, Path("night_diagram.png"))
    try:
        from ..plots import night_diagram

        with atomic_path(diagram) as tmp:
            how = night_diagram(catalogue, tmp)
        outputs["night_diagram"] = diagram
        if how:
            notes.append(how)
    except Exception as exc:  # noqa: BLE001
        notes.append(f"night diagram not drawn: {type(exc).__name__}: {exc}")
    try:
        from ..report import write_report

        target = inside(out, Path("report.html"))
        with atomic_path(target) as tmp:
            write_report(catalogue, out, tmp, diagram=outputs.get("night_diagram"), stages=stages)
        outputs["report"] = target
    except Exception as exc:  # noqa: BLE001
        notes.append(f"report not written: {type(exc).__name__}: {exc}\n{traceback.format_exc()}")
    return outputs, notes

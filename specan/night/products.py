"""The night's own products beside the catalogue: the night diagram and the HTML report."""

from __future__ import annotations

import traceback
from pathlib import Path

from .files import atomic_path, inside

__all__ = ["write_night_products", "NightRows", "DiagramAside"]


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


def _diagram(out, source):
    """Draw the night diagram from ``source`` to ``out``; (path, note), path None where it failed."""
    diagram = inside(out, Path("night_diagram.png"))
    try:
        from ..plots import night_diagram

        with atomic_path(diagram) as tmp:
            how = night_diagram(source, tmp)
        return diagram, how
    except Exception as exc:  # noqa: BLE001
        return None, f"night diagram not drawn: {type(exc).__name__}: {exc}"


def _products(out, diagram_source, write_page, drawn=None):
    """Draw the diagram from ``diagram_source`` (or take ``drawn``, a :func:`_diagram` result), then
    ``write_page(tmp, diagram)``; (outputs, notes)."""
    outputs, notes = {}, []
    path, how = drawn if drawn is not None else _diagram(out, diagram_source)
    if path is not None:
        outputs["night_diagram"] = path
    if how:
        notes.append(how)
    try:
        target = inside(out, Path("report.html"))
        with atomic_path(target) as tmp:
            write_page(tmp, outputs.get("night_diagram"))
        outputs["report"] = target
    except Exception as exc:  # noqa: BLE001
        notes.append(f"report not written: {type(exc).__name__}: {exc}\n{traceback.format_exc()}")
    return outputs, notes


class DiagramAside:
    """The night diagram drawn by a forked copy of this process, while this one writes the rest.

    For a run given several processes (``--jobs``): its workers are done by the time the
    catalogue is written, and the diagram (0.3-0.4 s for 1,000 stars, measured) need not wait
    for the catalogue and the report's rows (0.5-0.6 s) to be written first. The copy gathers
    the diagram's stars from the stored records itself (``gather()``, which returns what
    :func:`specan.plots.night_diagram` draws), so that nothing has to be sent to it; only the
    outcome comes back. :meth:`start` returns None where a copy cannot be forked safely (no
    fork on this system, or other threads running); the caller then draws in this process.
    """

    def __init__(self, process, receiver):
        self._process, self._receiver = process, receiver

    @classmethod
    def start(cls, out, gather):
        """Fork the copy and return its handle, or None (see the class)."""
        import multiprocessing

        from .executors import start_method

        if start_method() != "fork":   # (which it is not while other threads run, unless forced)
            return None
        ctx = multiprocessing.get_context("fork")
        receiver, sender = ctx.Pipe(duplex=False)
        process = ctx.Process(target=_draw_aside, args=(sender, out, gather), daemon=True)
        process.start()
        sender.close()
        return cls(process, receiver)

    def result(self):
        """Wait for the copy; ``(path, note)`` as :func:`_diagram` gives."""
        try:
            path, how = self._receiver.recv()
        except EOFError:
            self._process.join()
            return None, f"night diagram not drawn: its process ended with status {self._process.exitcode}"
        self._process.join()
        return (None if path is None else Path(path)), how

    def stop(self):
        """End the copy if it is still running (the run failed or was interrupted)."""
        if self._process.is_alive():
            self._process.terminate()
        self._process.join()
        self._receiver.close()


def _draw_aside(sender, out, gather):
    """What :class:`DiagramAside`'s copy runs: gather the stars, draw, send back (path, note)."""
    try:
        path, how = _diagram(out, gather())
    except BaseException as exc:  # noqa: BLE001 - gathering failed (or was interrupted): said in the note
        path, how = None, f"night diagram not drawn: {type(exc).__name__}: {exc}"
    sender.send((None if path is None else str(path), how))
    sender.close()


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
    aside : DiagramAside, optional
        The diagram is being drawn there: no stars are gathered here.
    """

    def __init__(self, out, columns, aside=None):
        from ..hrdiagram import HRPoints
        from ..report import ReportRows

        self.out = Path(out)
        self.rows = ReportRows(self.out, columns)
        self.aside = aside
        self.points = HRPoints() if aside is None else None

    def add(self, chunk, first_index):
        """Take a chunk of catalogue rows; ``first_index`` is the input number of its first row."""
        self.rows.add(chunk, first_index)
        if self.points is not None:
            self.points.add(chunk)

    def write_products(self, night, stages):
        """Night diagram and report page; (outputs, notes) as :func:`write_night_products`."""
        def page(tmp, diagram):
            from ..report import write_report_page

            write_report_page(tmp, self.rows, night, stages=stages, diagram=diagram)

        drawn = self.aside.result() if self.aside is not None else None
        return _products(self.out, self.points, page, drawn)

    def close(self):
        """Drop the temporary row files (and stop the diagram's copy, if it is still drawing)."""
        try:
            self.rows.close()
        finally:
            if self.aside is not None:
                self.aside.stop()

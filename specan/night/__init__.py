"""The pieces a night run is made of, each replaceable on its own.

:mod:`specan.pipeline` is the recipe; these modules are its ingredients:

``inputs``
    which files a run analyses, and the names and hashes that identify them;
``files``
    atomic writes inside the output folder;
``row``
    one input's catalogue row, collected while its stages run;
``records``
    one stored record per input, and when a stored record is current;
``executors``
    where the per-input analysis runs (this process, local processes, dask);
``catalogue``
    the catalogue table assembled from the records, and its writers;
``products``
    the night diagram and the HTML report.
"""

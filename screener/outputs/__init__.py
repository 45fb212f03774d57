"""Writers: rasters, tables, vectors, waypoints, figures, report and field sheets.

Only this subpackage, :mod:`screener.pipeline` and :mod:`screener.cli` touch files.
"""

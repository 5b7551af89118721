"""The HTML report of a planning step: its data (slices, maps, model checks), figures and page.

A report shows what a careful reader needs to judge one planning step: the
cautions first, the fingerprints of the inputs and the decision log, the
proposed batch with every ranking value, one-factor slices of every model
through each proposal, a map of the joint figure over two factors, the
exclusions and near misses, the model checks and the run history.

Modules, one idea each:

- ``data``: the geometry of slices and maps (which factors move, how a
  mixture keeps its total) and the models' predictions along them;
- ``style``: the figures' looks (colours, fixed layouts, legends) and the
  step from a figure to inline SVG and PNG;
- ``figures``: the slice, map, model-check and history figures;
- ``tables``: the page's tables as rows of text, and the model warnings;
- ``page``: the page itself (:func:`build_report`) and writing it
  (:func:`write_report`);
- ``folder``: reports of the steps recorded in a campaign folder.
"""

from guardband.planner.report.data import MapData, SliceData, default_map_factors, map_data, slice_data
from guardband.planner.report.folder import report_folder, report_plan
from guardband.planner.report.page import Report, ReportFiles, build_report, write_report
from guardband.planner.report.style import ReportFigure
from guardband.planner.report.tables import model_warnings

__all__ = [
    "report_folder",
    "report_plan",
    "build_report",
    "write_report",
    "Report",
    "ReportFiles",
    "ReportFigure",
    "slice_data",
    "map_data",
    "default_map_factors",
    "SliceData",
    "MapData",
    "model_warnings",
]

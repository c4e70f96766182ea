"""The design report: one self-contained HTML page for chosen candidates of a run.

Seven figures (embedded as base64 PNG; no network, no JavaScript), then each
candidate's requirement table, certificate, controller in zero/pole/gain form and
the safety caution. Optionally the figures as PNG files too.

Two layers, kept apart so that tests can check the numbers without pixels:

* plot data: small pure functions (``reference_step_data`` ... ``tradeoff_data``)
  that return :class:`FigureData` built only from the evaluator's own results:
  the sampled step responses of :func:`synth.evaluate.step_responses`, the metric
  record of :func:`synth.describe.check_controller` (margins, crossover and peak
  frequencies, certified closed-loop poles), the hidden-mode test of
  :func:`synth.evaluate.stability.hidden_mode_mask` and the exact frequency
  response ``plant(jw) * controller(jw)``. Nothing is re-measured from a plot grid;
  a marker is placed at the frequency the evaluator reported and its label carries
  the evaluator's number;
* drawing: :func:`render_figure` turns a FigureData into a matplotlib Figure
  (Agg canvas, no pyplot state), :func:`html_page` assembles the page and
  :func:`write_outputs` stages every file in its folder and renames it into place,
  so a failure leaves nothing half-written.

Modules: ``candidates`` (which candidates, their records), ``plotdata`` (the shared
plot-data records), one module per family of figures (``time_figures``,
``frequency_figures``, ``pole_figures``, ``tradeoff_figures``), ``style`` (palette),
``draw`` (matplotlib), ``page`` (the figures of a run and the HTML page) and
``output`` (files, :func:`build_report`).
"""


from .candidates import (FRONT_SIZE, MAX_CANDIDATES, Candidate, ReportError, StepSeries, cancelled_roots,
                         choose_front, load_candidates)
from .draw import figure_png, render_figure
from .frequency_figures import (complex_plane_data, frequency_grid, loop_frequency_data, loop_response,
                                unwrapped_phase_deg)
from .output import build_report, png_names, write_outputs
from .page import ReportData, html_page, report_data, requirement_table_html, roots_text
from .plotdata import Bound, Curve, Disc, FigureData, Mark, Panel, Points, Region
from .pole_figures import pole_map_data
from .style import (ALLOWED_FACE, DASHES, DPI, FIGURE_KEYS, FORBIDDEN_FACE, LIMIT_COLOR, MARKERS, METRIC_AXIS,
                    PALETTE)
from .time_figures import control_signal_data, load_step_data, reference_step_data
from .tradeoff_figures import tradeoff_data

__all__ = ["ReportError", "build_report", "report_data", "choose_front", "render_figure",
           "html_page", "write_outputs", "roots_text", "FigureData", "Panel", "Curve", "Bound", "Mark", "Points",
           "Region", "Disc", "Candidate"]

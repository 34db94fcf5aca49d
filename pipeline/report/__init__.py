"""Figures and a self-contained HTML report over a result folder or a batch folder.

In: a folder written by vesselflow, read back and never changed apart from
the two report entries below:

- a **sample folder** (``run.json`` and ``segments.csv``, as ``analyze``
  writes it, read with :func:`pipeline.tables.load_result`), and optionally
  the mask it was made from (``run.json["input"]["path"]`` or ``mask=``),
  read with :func:`pipeline.reading.read_mask` for the projection map; an
  optional ``review.csv`` of review decisions is shown beside the flagged
  bifurcations (checked as ``summarize --apply-review`` checks it: an
  invalid one stops a sample report, and is a note in that sample's section
  of a study report);
- a **batch folder** (``cohort_summary.csv``, ``group_comparison.csv``,
  ``failures.csv``, ``batch.json`` and one sample folder per sample).

Out: ``report.html`` and ``figures/<name>.png`` + ``figures/<name>.svg`` in
that folder. The HTML is self-contained: figures are embedded as base64 PNG
``data:`` URIs, styles are inline, there is no script, and a
Content-Security-Policy in the page forbids loading anything else, so it
opens offline and can be mailed as one file. Everything is built in memory
first, then written into a temporary sibling folder and moved into place;
``report.html`` is moved last, so its presence marks a complete report.

Figures of a sample: a projection map of the mask along z with centrelines
coloured by branching level and one coloured by wall shear stress (flagged
bifurcations circled and numbered by node id), radius and length
distributions, radius by branching level with the ratios between levels, the
Murray plot of r0³ against r1³ + r2³ with the identity line, the junction
exponents with 2 and 3 marked, wall shear stress against diameter, and flow
against radius with a slope-3 guide (Q ∝ r³ under Murray's law; Murray CD
1926, PNAS 12:207). Figures of a study: box-and-point plots per group for
the science measures of :data:`pipeline.batch.SCIENCE_MEASURES` (titled by
their plain names and units), annotated with the comparison table's
Hodges-Lehmann shift and q-values, and the network Murray exponent with its
95 % interval per sample (``murray_exponent_network``, ``_ci_low``,
``_ci_high`` of each summary) and per group: the group's one-sample
Hodges-Lehmann estimate with its Wilcoxon signed-rank interval
(:func:`pipeline.batch.hodges_lehmann_one_sample`; exact coverage stated,
below 95 % for fewer than six samples). The bookkeeping columns
(``group_bookkeeping.csv``) are listed apart, untested. Results without the
network exponent (older versions) get a sentence saying so.

Flow sections of a sample (when flow was solved): **flow plausibility**,
the mean speed and wall shear stress of the perfused segments by diameter


class (``flow.capillary_max_diameter_um``,
``flow.small_vessel_max_diameter_um``) against the published ranges of
:data:`pipeline.flow.PLAUSIBLE` (shaded, sources in the caption), the
perfused length fraction, the class statistics of ``summary.json`` and the
warnings of :func:`pipeline.flow.plausibility_warnings` in plain sentences
(:func:`plausibility_messages`); **uncertainty**, the share of perfused
segments whose direction confidence is at least
:data:`DIRECTION_CONFIDENCE_MIN`, the relative width ``(p95 - p05) /
|flow|`` of the ensemble's flow intervals (:func:`flow_uncertainty`) and a
plot of every segment's flow against its interval. The bifurcation section
lists the flagged junctions from the most severe (``severity``) with their
``flow_pattern``, counts the uncertain ones by reason without listing them,
and shows the Murray medians per flow pattern where the summary has them.

Colours: continuous values use viridis or cividis, whose lightness rises
monotonically so they read in grey and by colour-blind readers; categories
(branching levels, groups) use the Okabe–Ito palette (Okabe M, Ito K (2002)
Color Universal Design (CUD): how to make figures and presentations that
are friendly to colorblind people). Rendering uses matplotlib
:class:`~matplotlib.figure.Figure` objects directly (no pyplot, no display).

Layout (each module's docstring says what comes in and what goes out):
``_common`` (constants, labels, formatting, figure helpers) ->
``plausibility`` (flow checks against published ranges, uncertainty) ->
``sample`` (a sample folder read back, its figures) and ``study`` (a
batch's figures and network-exponent table) -> ``page`` (HTML sections,
figures embedded) -> ``build`` (:func:`build_report`: the folder kind,
publishing). Only this package imports matplotlib.
"""

from ._common import FLOW_FIGURES, OKABE_ITO, SAMPLE_FIGURES, STUDY_MEASURES
from .plausibility import (
    DIRECTION_CONFIDENCE_MIN, diameter_class, figure_flow_intervals, figure_flow_plausibility, flow_uncertainty,
    plausibility_checks, plausibility_messages,
)
from .sample import (
    SampleData, figure_distributions, figure_exponents, figure_flow_radius, figure_map_level, figure_map_wss,
    figure_murray, figure_radius_by_level, figure_wss_diameter, load_sample, sample_figures,
)
from .study import figure_network_exponent, figure_study_measure, network_exponent_table, study_figures
from .build import build_report

__all__ = [
    "build_report",
    "load_sample",
    "SampleData",
    "sample_figures",
    "study_figures",
    "figure_map_level",
    "figure_map_wss",
    "figure_distributions",
    "figure_radius_by_level",
    "figure_murray",
    "figure_exponents",
    "figure_wss_diameter",
    "figure_flow_radius",
    "figure_flow_plausibility",
    "figure_flow_intervals",
    "figure_study_measure",
    "figure_network_exponent",
    "network_exponent_table",
    "diameter_class",
    "flow_uncertainty",
    "plausibility_checks",
    "plausibility_messages",
    "DIRECTION_CONFIDENCE_MIN",
    "OKABE_ITO",
    "SAMPLE_FIGURES",
    "FLOW_FIGURES",
    "STUDY_MEASURES",
]

"""What every report figure shares: the :class:`Plot` it returns, style, palette and scale labels.

Figures are drawn with matplotlib's object API (no global state), embedded in
the page as SVG data URIs and saved under ``figures/`` in the run folder as
SVG and PNG (:meth:`Plot.png`). Figure modules: :mod:`hierwork.report.estimate_figures`
(groups on the outcome's scale, the funnel, pooling) and
:mod:`hierwork.report.diagnostic_figures` (sampler and predictive checks).

Colours are the Okabe and Ito (2008) palette, "Color Universal Design",
chosen to stay distinguishable under the common colour-vision deficiencies;
marker shape and line style carry the same meaning as colour so that nothing
depends on colour alone.
"""
from __future__ import annotations

import base64
import functools
import io
import math
from dataclasses import dataclass, field

import matplotlib
from matplotlib.figure import Figure
from matplotlib.ticker import FuncFormatter

from hierwork.formatting import number as fmt

__all__ = ["Plot", "PALETTE", "Scale", "styled", "new_figure", "finish", "clip_text", "scale_of"]

#: Okabe and Ito (2008) colours.
PALETTE = {"black": "#000000", "orange": "#E69F00", "sky": "#56B4E9", "green": "#009E73",
           "yellow": "#F0E442", "blue": "#0072B2", "vermillion": "#D55E00",
           "purple": "#CC79A7"}
GREY = "#8a8a8a"
_STYLE = {
    "font.size": 8, "axes.titlesize": 9, "axes.labelsize": 8, "legend.fontsize": 7,
    "xtick.labelsize": 7, "ytick.labelsize": 7, "axes.spines.top": False,
    "axes.spines.right": False, "axes.edgecolor": "#444444", "axes.grid": True,
    "grid.color": "#e4e4e4", "grid.linewidth": 0.6, "axes.axisbelow": True,
    "svg.fonttype": "none", "svg.hashsalt": "hierwork", "font.family": "sans-serif",
}
#: Resolution of the PNG copies (dots per inch).
PNG_DPI = 150


@dataclass(frozen=True)
class Plot:
    """An embedded figure: ``uri`` (SVG data URI), ``alt`` text and ``caption``; ``png()`` renders a PNG.

    Shown inline by Jupyter (``_repr_svg_``).
    """

    uri: str
    alt: str
    caption: str
    figure: Figure | None = field(default=None, repr=False, compare=False)

    @property
    def svg(self) -> str:
        """The SVG document."""
        return base64.b64decode(self.uri.split(",", 1)[1]).decode("utf-8")

    def png(self) -> bytes:
        """The figure as PNG (drawn on first request)."""
        buffer = io.BytesIO()
        with matplotlib.rc_context(_STYLE):
            self.figure.savefig(buffer, format="png", dpi=PNG_DPI, metadata={"Software": None})
        return buffer.getvalue()

    def _repr_svg_(self) -> str:
        return self.svg


@dataclass(frozen=True)
class Scale:
    """The outcome's scale for axes and text: ``kind`` (``probability``, ``rate``,
    ``outcome units``), ``label`` (``probability of late (out of deliveries)``) and
    the name of the exposure column, if any. Probabilities are shown as
    percentages (changes in percentage points)."""

    kind: str
    label: str
    exposure: str | None = None

    @property
    def percent(self) -> bool:
        return self.kind == "probability"

    def text(self, value, change: bool = False) -> str:
        """``8.16%`` for a probability (``+1.2 pp`` for a change), else the number."""
        if value is None or (isinstance(value, float) and math.isnan(value)):
            return "-"
        if not self.percent:
            return fmt(value)
        shown = fmt(100 * float(value), 3)
        return (f"{'+' if value > 0 else ''}{shown} pp" if change else f"{shown}%")

    def axis_label(self, term: str) -> str:
        if term == "intercept":
            return self.label + (" (%)" if self.percent else "")
        if term == "spread":
            return f"residual SD of {self.label}"
        unit = "percentage points" if self.percent else "change"
        return f"{unit} of {self.label} per unit of {term}"

    def format_axis(self, axis) -> None:
        """Percent tick labels on a probability axis."""
        if self.percent:
            axis.set_major_formatter(FuncFormatter(lambda v, _: f"{100 * v:.3g}"))


def scale_of(estimands: dict | None, family: str, outcome: str = "outcome", exposure: str | None = None) -> Scale:
    """The :class:`Scale` of a run: from ``plan.json``'s estimands, else from the family (older runs)."""
    if estimands:
        return Scale(str(estimands.get("kind", "outcome units")), str(estimands.get("label", outcome)), exposure)
    from hierwork.plan.families import REGISTRY, get_family

    kind = get_family(family).outcome_scale if family in REGISTRY else "outcome units"
    return Scale(kind, outcome, exposure)


def clip_text(value, width: int = 30) -> str:
    """A user-supplied label made safe for matplotlib: ``$`` would start math mode."""
    text = str(value)
    if len(text) > width:
        text = text[: width - 1] + "\u2026"
    return text.replace("$", r"\$")


def styled(draw):
    """Run a figure function under the report's matplotlib style (no global change)."""
    @functools.wraps(draw)
    def wrapper(*args, **kwargs):
        with matplotlib.rc_context(_STYLE):
            return draw(*args, **kwargs)
    return wrapper


def new_figure(width: float, height: float) -> Figure:
    return Figure(figsize=(width, height), layout="constrained")


def finish(fig: Figure, alt: str, caption: str, stamp: str | None = None) -> Plot:
    """Stamp ``fig`` when its run is not for use, and wrap it as a :class:`Plot`."""
    if stamp:
        fig.text(0.5, 0.5, stamp, ha="center", va="center",
                 rotation=20, fontsize=22, color=PALETTE["vermillion"], alpha=0.28,
                 weight="bold")
    buffer = io.BytesIO()
    fig.savefig(buffer, format="svg", metadata={"Date": None, "Creator": None})
    fig.set_layout_engine("none")  # keep the layout just computed: the PNG copy is drawn without recomputing it
    uri = "data:image/svg+xml;base64," + base64.b64encode(buffer.getvalue()).decode("ascii")
    return Plot(uri, alt, caption, fig)

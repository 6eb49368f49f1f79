"""Charts of the meeting pack, drawn with matplotlib and returned as inline SVG text.

SVG keeps lines sharp in print and lets the HTML carry its own pictures.  Text is
kept as SVG ``<text>`` (``svg.fonttype = none``) so files stay small and
WeasyPrint sets the labels in the pack's own font.  Element ids are salted per
chart so many charts can share one HTML page without clashing.
"""

from __future__ import annotations

import io
import re
from collections.abc import Callable, Mapping, Sequence

import matplotlib

matplotlib.use("Agg")  # no display in a batch job; must precede pyplot-free Figure use on some setups

import numpy as np
from matplotlib import rc_context
from matplotlib.backends.backend_svg import FigureCanvasSVG
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import Patch
from matplotlib.ticker import FuncFormatter, MaxNLocator
from markupsafe import Markup

from consensus import vocabulary
from consensus.periods import month_indexes

#: Colours chosen for this pack: a dark neutral for history, a deep blue for the
#: consensus, and each source's own hue and dash pattern from the registry
#: (:data:`consensus.vocabulary.SOURCES`), spread in lightness as well as hue so
#: they stay apart for the common colour-vision deficiencies.
ACTUAL_COLOUR = "#1d1d1f"
PREVIOUS_COLOUR = "#9a9a9a"
#: One meaning per colour wherever a direction is good or bad (error, bias):
#: deep blue is better, dark amber worse (amber is also the pack's flag colour:
#: both ask for attention); plain ups and downs stay neutral.
TONE_COLOURS = {"better": "#0b4f8a", "worse": "#9c4f00", "neutral": "#8a8a8a"}
ACTUAL_LABEL = "Actual"
PREVIOUS_LABEL = "Last cycle's plan"

_RC = {
    "svg.fonttype": "none",
    "font.family": "DejaVu Sans",
    "font.size": 7.5,
    "axes.linewidth": 0.6,
    "axes.edgecolor": "#555555",
    "axes.labelcolor": "#333333",
    "xtick.color": "#444444",
    "ytick.color": "#444444",
    "xtick.major.width": 0.5,
    "ytick.major.width": 0.5,
    "path.simplify": True,
}
_MONTH_ABBR = ("Jan", "Feb", "Mar", "Apr", "May", "Jun", "Jul", "Aug", "Sep", "Oct", "Nov", "Dec")
_PROLOGUE = re.compile(r"^.*?(?=<svg)", re.S)
_METADATA = re.compile(r"<metadata>.*?</metadata>\s*", re.S)
_ID_OR_REFERENCE = re.compile(r'(id="|url\(#|href="#)([^")]+)')
_PLAIN_GROUP = re.compile(r'<g id="[^"]*">')


def source_style(source: str) -> tuple[str, tuple | None]:
    """Colour and dash pattern of a source's line, from the sources registry."""
    kind = vocabulary.source(source)
    return kind.colour, kind.dashes


def _consensus_colour() -> str:
    return vocabulary.source("consensus").colour


def _thousands(value: float, _pos=None) -> str:
    return f"{value:,.0f}"


def _month_label(index: float, _pos=None) -> str:
    year, month0 = divmod(int(round(index)), 12)
    return f"{_MONTH_ABBR[month0]}\n{year}" if month0 == 0 or _pos == 0 else _MONTH_ABBR[month0]


def _unwrap_plain_groups(text: str) -> str:
    """Drop ``<g id="…">`` wrappers that carry nothing but an id.

    matplotlib wraps every artist in such a group; WeasyPrint's SVG renderer
    cascades styles node by node, so removing them roughly halves drawing time.
    The writer puts each group tag on its own line, which makes a line scan with
    a stack exact; anything unexpected returns the text unchanged.
    """
    out, dropped = [], []
    for line in text.split("\n"):
        stripped = line.strip()
        if stripped.startswith("<g"):
            plain = _PLAIN_GROUP.fullmatch(stripped) is not None
            dropped.append(plain)
            if plain:
                continue
        elif stripped == "</g>":
            if not dropped:
                return text
            if dropped.pop():
                continue
        out.append(line)
    return "\n".join(out) if not dropped else text


def _figure_to_svg(figure: Figure, salt: str) -> str:
    buffer = io.StringIO()
    with rc_context({**_RC, "svg.hashsalt": salt}):
        FigureCanvasSVG(figure).print_svg(buffer, metadata={"Date": None, "Creator": None})
    text = _METADATA.sub("", _PROLOGUE.sub("", buffer.getvalue(), count=1))
    text = _unwrap_plain_groups(text)
    # Same family as the page's tables, so the PDF embeds one sans face, not two.
    text = text.replace("'DejaVu Sans'", "'DejaVu Sans Condensed'")
    # Ids are salted per chart, and prefixed, so one HTML page can hold hundreds of charts.
    prefix = re.sub(r"[^A-Za-z0-9_-]", "-", salt)
    text = _ID_OR_REFERENCE.sub(lambda m: f"{m.group(1)}{prefix}-{m.group(2)}", text)
    return text.replace("<svg ", '<svg class="chart" role="img" ', 1)


def legend_entries(source_names: Sequence[str], *, with_previous: bool = True) -> list[dict[str, str]]:
    """The family chart's legend as HTML swatches: label plus a CSS background drawing the same dashes.

    Labels come from the sources registry, in the order given.  The legend
    sits in the page, not in each SVG, because it is identical on every family
    page and text inside SVG is the costliest thing to render.
    """
    blue = _consensus_colour()
    entries = [
        {"label": ACTUAL_LABEL, "kind": "line", "css": _dash_css(ACTUAL_COLOUR, None, 1.3)},
        {"label": vocabulary.source_label("consensus"), "kind": "line strong", "css": _dash_css(blue, None, 2.6)},
        {"label": "80% band", "kind": "band", "css": f"background: {blue}; opacity: 0.34"},
        {"label": "95% band", "kind": "band", "css": f"background: {blue}; opacity: 0.14"},
    ]
    if with_previous:
        entries.append({"label": PREVIOUS_LABEL, "kind": "line", "css": _dash_css(PREVIOUS_COLOUR, (0, (1, 1.2)), 0.9)})
    for name in source_names:
        colour, dashes = source_style(name)
        entries.append({"label": vocabulary.source_label(name), "kind": "line", "source": name,
                        "css": _dash_css(colour, dashes, 1.0)})
    return entries


def _dash_css(colour: str, dashes: tuple | None, width_pt: float) -> str:
    """CSS drawing a matplotlib dash pattern (on/off lengths in line widths) as a repeating gradient."""
    height = f"height: {max(width_pt, 1.0):.1f}pt"
    if dashes is None:
        return f"background: {colour}; {height}"
    _, pattern = dashes
    scale = max(width_pt, 1.0)  # matplotlib scales dashes with the line width
    stops, at = [], 0.0
    for i, length in enumerate(pattern):
        end = at + length * scale
        paint = colour if i % 2 == 0 else "rgba(255,255,255,0)"
        stops.append(f"{paint} {at:.2f}pt, {paint} {end:.2f}pt")
        at = end
    return f"background: repeating-linear-gradient(to right, {', '.join(stops)}); {height}"


def _style_axes(ax, *, y_label: str) -> None:
    ax.spines[["top", "right"]].set_visible(False)
    ax.yaxis.set_major_formatter(FuncFormatter(_thousands))
    ax.yaxis.set_major_locator(MaxNLocator(nbins=5, min_n_ticks=3))
    ax.set_ylabel(y_label)
    ax.grid(axis="y", color="#e3e3e3", linewidth=0.5)
    ax.set_axisbelow(True)
    ax.margins(x=0.01)


class DeferredChart:
    """A chart drawn the first time a page shows it, then kept.

    A family page's chart is most of what building its page costs; deferred, the pack can lay out its first
    family pages in other processes while this one is still drawing the later ones' charts.  Truthy before it
    is drawn, so a template's ``{% if chart %}`` does not draw it.
    """

    __slots__ = ("_draw", "_svg")

    def __init__(self, draw: Callable[[], str]) -> None:
        self._draw, self._svg = draw, None

    @property
    def svg(self) -> Markup:
        if self._svg is None:
            self._svg = Markup(self._draw())
            self._draw = None
        return self._svg

    def __html__(self) -> str:
        return self.svg

    def __str__(self) -> str:
        return str(self.svg)


class FamilyChartPainter:
    """Draws the family chart for many families on one reused figure.

    Building a matplotlib figure (axes, ticks, legend) costs more than drawing it,
    and every family page shares the same months and sources, so the artists are
    made once and each family only swaps the data in.
    """

    def __init__(
        self,
        *,
        history_months: Sequence[str],
        plan_months: Sequence[str],
        source_names: Sequence[str],
        quantity_unit: str = "units",
        with_previous: bool = True,
        with_legend: bool = False,
    ) -> None:
        self.hist_x = month_indexes(_series(history_months)) if len(history_months) else np.array([], dtype=int)
        self.plan_x = month_indexes(_series(plan_months)) if len(plan_months) else np.array([], dtype=int)
        self.source_names = list(source_names)
        nan_plan = np.full(len(self.plan_x), np.nan)
        blue = _consensus_colour()
        with rc_context(_RC):
            figure = Figure(figsize=(7.0, 2.6 if with_legend else 1.95))
            ax = figure.add_axes((0.085, 0.3, 0.9, 0.64))
            self.band_95 = ax.fill_between(self.plan_x, nan_plan, nan_plan, color=blue, alpha=0.12,
                                           linewidth=0, label="95% band")
            self.band_80 = ax.fill_between(self.plan_x, nan_plan, nan_plan, color=blue, alpha=0.26,
                                           linewidth=0, label="80% band")
            self.previous_line = None
            if with_previous:
                (self.previous_line,) = ax.plot(self.plan_x, nan_plan, color=PREVIOUS_COLOUR, linewidth=0.9,
                                                linestyle=(0, (1, 1.2)), label=PREVIOUS_LABEL)
            self.source_lines = {}
            for name in self.source_names:
                colour, dashes = source_style(name)
                (self.source_lines[name],) = ax.plot(self.plan_x, nan_plan, color=colour, linewidth=1.0,
                                                     linestyle=dashes if dashes is not None else "-",
                                                     label=vocabulary.source_label(name))
            (self.actual_line,) = ax.plot(self.hist_x, np.full(len(self.hist_x), np.nan), color=ACTUAL_COLOUR,
                                          linewidth=1.3, label=ACTUAL_LABEL)
            join_x = np.concatenate([self.hist_x[-1:], self.plan_x])
            (self.consensus_line,) = ax.plot(join_x, np.full(len(join_x), np.nan), color=blue, linewidth=2.6,
                                             label=vocabulary.source_label("consensus"), solid_capstyle="round",
                                             zorder=5)
            _style_axes(ax, y_label=f"{quantity_unit} per month")
            ax.yaxis.set_major_locator(MaxNLocator(nbins=4, min_n_ticks=3))
            all_x = np.concatenate([self.hist_x, self.plan_x])
            if len(all_x):
                # Labels each January and July (year under January and the first label), marks each quarter.
                labelled = all_x[all_x % 6 == 0]
                ax.set_xticks(labelled, [_month_label(t, i) for i, t in enumerate(labelled)])
                ax.set_xticks(all_x[all_x % 3 == 0], minor=True)
                ax.tick_params(axis="x", which="minor", length=2, width=0.4)
                ax.set_xlim(all_x[0] - 0.5, all_x[-1] + 0.5)
            # Everything is drawn inside the limits set per family, so clipping only costs time.
            for artist in [*ax.lines, *ax.collections]:
                artist.set_clip_on(False)
            ax.patch.set_visible(False)
            figure.patch.set_visible(False)
            ax.set_xlabel("month", labelpad=1, loc="left")
            if len(self.hist_x) and len(self.plan_x):
                boundary = self.hist_x[-1] + 0.5
                ax.axvline(boundary, color="#333333", linewidth=0.8)
                on_top = ax.get_xaxis_transform()  # x in months, y as a fraction of the axes
                ax.text(boundary - 0.4, 0.99, "◀ history", transform=on_top, ha="right", va="top", fontsize=7,
                        color="#333333")
                ax.text(boundary + 0.4, 0.99, "plan ▶", transform=on_top, ha="left", va="top", fontsize=7,
                        color="#333333")
            if with_legend:
                handles, labels = ax.get_legend_handles_labels()
                order = _legend_order(labels)
                figure.legend([handles[i] for i in order], [labels[i] for i in order], loc="lower center",
                              ncol=min(len(order), 5), frameon=False, fontsize=6.8, handlelength=2.8,
                              columnspacing=1.6, bbox_to_anchor=(0.5, 0.0))
            else:
                ax.set_position((0.085, 0.23, 0.9, 0.71))
        self.figure, self.ax = figure, ax

    def draw(
        self,
        *,
        actual: np.ndarray,
        consensus: np.ndarray,
        lower_80: np.ndarray,
        upper_80: np.ndarray,
        lower_95: np.ndarray,
        upper_95: np.ndarray,
        sources: Mapping[str, np.ndarray],
        previous: np.ndarray | None = None,
        salt: str = "family",
    ) -> str:
        """SVG of one family: actuals, each source, the consensus with its 80%/95% band, history | plan rule."""
        actual = np.asarray(actual, dtype=float)
        consensus = np.asarray(consensus, dtype=float)
        self.band_95.set_data(self.plan_x, lower_95, upper_95)
        self.band_80.set_data(self.plan_x, lower_80, upper_80)
        if self.previous_line is not None:
            self.previous_line.set_ydata(np.full(len(self.plan_x), np.nan) if previous is None else previous)
        for name, line in self.source_lines.items():
            values = sources.get(name)
            line.set_ydata(np.full(len(self.plan_x), np.nan) if values is None else values)
        self.actual_line.set_ydata(actual)
        # Join the plan to the last actual so the eye reads one continuous story.
        self.consensus_line.set_ydata(np.concatenate([actual[-1:], consensus]) if len(self.hist_x) else consensus)
        stacked = [actual, consensus, upper_95, *(v for v in sources.values())]
        if previous is not None:
            stacked.append(previous)
        finite = np.concatenate([np.asarray(v, dtype=float).ravel() for v in stacked])
        finite = finite[np.isfinite(finite)]
        top = float(finite.max()) if finite.size else 1.0
        # Head-room for the history/plan labels above the highest line.
        self.ax.set_ylim(0, max(top, 1.0) * 1.12)
        return _figure_to_svg(self.figure, salt)


def draw_family_chart(
    *,
    history_months: Sequence[str],
    actual: np.ndarray,
    plan_months: Sequence[str],
    consensus: np.ndarray,
    lower_80: np.ndarray,
    upper_80: np.ndarray,
    lower_95: np.ndarray,
    upper_95: np.ndarray,
    sources: Mapping[str, np.ndarray],
    previous: np.ndarray | None = None,
    quantity_unit: str = "units",
    salt: str = "family",
) -> str:
    """SVG of one family chart with its own legend (a one-off :class:`FamilyChartPainter`)."""
    painter = FamilyChartPainter(history_months=history_months, plan_months=plan_months,
                                 source_names=list(sources), quantity_unit=quantity_unit,
                                 with_previous=previous is not None, with_legend=True)
    return painter.draw(actual=actual, consensus=consensus, lower_80=lower_80, upper_80=upper_80,
                        lower_95=lower_95, upper_95=upper_95, sources=sources, previous=previous, salt=salt)


def _legend_order(labels: list[str]) -> list[int]:
    first = [ACTUAL_LABEL, vocabulary.source_label("consensus"), "80% band", "95% band", PREVIOUS_LABEL]
    ranked = [labels.index(name) for name in first if name in labels]
    return ranked + [i for i, name in enumerate(labels) if name not in first]


def spread_labels(values: Sequence[float], *, gap: float, floor: float, ceiling: float) -> list[float]:
    """Heights for end-of-line labels of ascending ``values``: each at least ``gap`` above the one below it, and the
    stack kept inside [floor, ceiling] (pushed down from the top when pushing up would run it off the chart)."""
    placed: list[float] = []
    for value in values:
        placed.append(max(value, placed[-1] + gap) if placed else value)
    for i in range(len(placed) - 1, -1, -1):  # from the top down: nothing above the ceiling
        limit = ceiling if i == len(placed) - 1 else placed[i + 1] - gap
        placed[i] = max(min(placed[i], limit), floor)
    return placed


def draw_accuracy_history(
    *, cycles: Sequence[str], wape_by_source: Mapping[str, np.ndarray], salt: str = "history"
) -> str:
    """SVG line chart of each source's WAPE (%) over recent cycles, keyed by source; labels from the registry."""
    with rc_context(_RC):
        figure = Figure(figsize=(7.0, 2.1))
        ax = figure.add_axes((0.085, 0.2, 0.68, 0.74))
        x = np.arange(len(cycles))
        ends = []
        for name, values in wape_by_source.items():
            colour, dashes = source_style(name)
            label = vocabulary.source_label(name)
            ax.plot(x, values, color=colour, linewidth=1.4, linestyle=dashes if dashes is not None else "-",
                    marker="o", markersize=2.5, label=label)
            if len(values) and np.isfinite(values[-1]):
                ends.append((float(values[-1]), label, colour))
        finite = np.concatenate([np.asarray(v, dtype=float) for v in wape_by_source.values()] or [np.zeros(1)])
        top = float(np.nanmax(finite)) if np.isfinite(finite).any() else 1.0
        ax.set_ylim(0, top * 1.1)
        # Direct labels at the right end, pushed apart so close lines stay readable.
        ends.sort()
        placed = spread_labels([value for value, _, _ in ends], gap=top * 1.1 * 0.075, floor=0.0, ceiling=top * 1.1)
        for (value, label, colour), y in zip(ends, placed):
            ax.annotate(f"{label} {value:.1f}%", (x[-1], value), xytext=(x[-1] + 0.35, y), textcoords="data",
                        va="center", fontsize=6.8, color=colour, annotation_clip=False)
        _style_axes(ax, y_label="WAPE, %")
        ax.set_xticks(x, list(cycles))
        ax.tick_params(axis="x", labelsize=6.3)
        ax.set_xlabel("cycle", labelpad=1)
    return _figure_to_svg(figure, salt)


def draw_value_added_steps(
    *, steps: Sequence[str], wape: np.ndarray, change: np.ndarray, tones: Sequence[str], salt: str = "fva"
) -> str:
    """SVG bars of forecast value added: WAPE (%) of each step, and its change against the step it should beat.

    ``steps`` are the labels printed under the bars (wrapped to two lines),
    ``change`` the difference in points against each step's baseline (NaN for
    none) and ``tones`` "better", "worse" or "neutral" for each bar's colour;
    a worse bar is also hatched, so the tone never rests on colour alone.
    """
    wape = np.asarray(wape, dtype=float)
    change = np.asarray(change, dtype=float)
    with rc_context(_RC):
        figure = Figure(figsize=(7.0, 2.5))
        ax = figure.add_axes((0.085, 0.22, 0.9, 0.72))
        x = np.arange(len(steps))
        colours = [TONE_COLOURS.get(tone, TONE_COLOURS["neutral"]) for tone in tones]
        bars = ax.bar(x, wape, color=colours, width=0.62, edgecolor="white", linewidth=0.6)
        for bar, tone in zip(bars, tones):
            bar.set_hatch("////" if tone == "worse" else "")
        for xi, w, c in zip(x, wape, change):
            if not np.isfinite(w):
                continue
            text = f"{w:.1f}%" if not np.isfinite(c) else f"{w:.1f}%\n{'▼' if c < 0 else '▲' if c > 0 else ''} {_signed(c)} pt"
            ax.text(xi, w, text, ha="center", va="bottom", fontsize=6.8, color="#222222")
        _style_axes(ax, y_label="WAPE, % (lower is better)")
        ax.set_ylim(0, (np.nanmax(wape) if np.isfinite(wape).any() else 1) * 1.35)
        ax.set_xticks(x, [_wrap(step, 16) for step in steps])
        ax.tick_params(axis="x", labelsize=6.8)
    return _figure_to_svg(figure, salt)


def draw_amplification(
    *, locations: Sequence[str], ratio: np.ndarray, bound: np.ndarray, limit: np.ndarray, flagged: np.ndarray,
    labels: Mapping[str, str], missing_texts: Sequence[str], salt: str = "amplification",
) -> str:
    """SVG of each DC's variance ratio (bars) against its bound and its limit (marks), one row per DC.

    ``labels`` names the ratio, bound and limit as the table does, and the
    out-of-line state ("ratio", "bound", "limit", "out_of_line");
    ``missing_texts`` is what a DC without a ratio shows instead of a bar (its
    state, e.g. "Not measured").  An out-of-line bar is amber and hatched, the
    others blue, so the flag never rests on colour alone.  The ratio 1 (demand
    passed on as it comes) is a thin rule.
    """
    ratio = np.asarray(ratio, dtype=float)
    bound = np.asarray(bound, dtype=float)
    limit = np.asarray(limit, dtype=float)
    flagged = np.asarray(flagged, dtype=bool)
    n = len(locations)
    # Rows thin out as DCs are added, so a dozen DCs still leave the page room for its table.
    row_inches = 0.24 if n <= 6 else max(0.12, 0.24 - 0.012 * (n - 6))
    height = 0.75 + row_inches * max(n, 1)
    with rc_context(_RC):
        figure = Figure(figsize=(7.0, height))
        bottom = 0.5 / height
        top = 0.22 / height
        ax = figure.add_axes((0.11, bottom, 0.86, 1 - bottom - top))
        y = np.arange(n)[::-1]  # first DC on top
        colours = [TONE_COLOURS["worse"] if f else _consensus_colour() for f in flagged]
        shown = np.isfinite(ratio)
        bars = ax.barh(y[shown], ratio[shown], height=0.62, color=np.asarray(colours, dtype=object)[shown],
                       edgecolor="white", linewidth=0.6, label=labels["ratio"], zorder=2)
        for bar, is_flagged in zip(bars, flagged[shown]):
            bar.set_hatch("////" if is_flagged else "")
        mark = 150 * (row_inches / 0.24) ** 2  # marker area in pt², as tall as a row
        ax.scatter(bound, y, marker="|", s=mark, linewidths=1.6, color=ACTUAL_COLOUR, label=labels["bound"], zorder=3)
        ax.scatter(limit, y, marker="|", s=mark, linewidths=1.4, color=TONE_COLOURS["worse"], label=labels["limit"],
                   zorder=3)
        finite = np.concatenate([ratio[shown], bound[np.isfinite(bound)], limit[np.isfinite(limit)], [1.0]])
        right = float(finite.max()) * 1.18
        # Each value at its bar's end, moved past a mark that its text would cross, so it stays readable.
        room = right * 0.075  # about the width of "0.00" at this size
        ends = ratio.copy()
        for marks in (bound, limit):
            crossed = (marks >= ends - right * 0.004) & (marks <= ends + room)
            ends = np.where(crossed, marks, ends)
        for yi, value, end, is_flagged in zip(y[shown], ratio[shown], ends[shown], flagged[shown]):
            ax.text(end + right * 0.012, yi, f"{value:.2f}", va="center", ha="left", fontsize=6.8,
                    color=TONE_COLOURS["worse"] if is_flagged else "#222222", fontweight="bold" if is_flagged
                    else "normal", zorder=4)
        for yi, text in zip(y[~shown], np.asarray(list(missing_texts), dtype=object)[~shown]):
            ax.text(right * 0.01, yi, str(text), va="center", ha="left", fontsize=6.8, color="#5b6470",
                    style="italic")
        ax.axvline(1.0, color="#8a8a8a", linewidth=0.6, zorder=1)
        ax.set_xlim(0, right)
        ax.set_ylim(-0.6, n - 0.4)
        ax.set_yticks(y, list(locations))
        ax.tick_params(axis="y", length=0, labelsize=7)
        ax.spines[["top", "right"]].set_visible(False)
        ax.grid(axis="x", color="#e3e3e3", linewidth=0.5)
        ax.set_axisbelow(True)
        ax.xaxis.set_major_locator(MaxNLocator(nbins=6))
        ax.set_xlabel("variance of orders ÷ variance of demand (1: passed on as it comes)", labelpad=1)
        # Proxy swatches, so the legend shows the ordinary bar whatever the first DC is, and the out-of-line one.
        handles = [Patch(facecolor=_consensus_colour(), edgecolor="white", label=labels["ratio"])]
        if flagged.any():
            handles.append(Patch(facecolor=TONE_COLOURS["worse"], edgecolor="white", hatch="////",
                                 label=labels["out_of_line"]))
        handles += [Line2D([], [], color=ACTUAL_COLOUR, marker="|", linestyle="none", markersize=9,
                           markeredgewidth=1.6, label=labels["bound"]),
                    Line2D([], [], color=TONE_COLOURS["worse"], marker="|", linestyle="none", markersize=9,
                           markeredgewidth=1.4, label=labels["limit"])]
        figure.legend(handles=handles, loc="upper right", ncol=len(handles), frameon=False, fontsize=6.8,
                      handlelength=1.6, bbox_to_anchor=(0.97, 1.0), borderaxespad=0.1)
    return _figure_to_svg(figure, salt)


def _signed(value: float) -> str:
    return f"{value:+.1f}".replace("-", "\u2212")


def _wrap(text: str, width: int) -> str:
    """A label broken into lines of about ``width`` characters at spaces, so neighbours never run together."""
    import textwrap

    return "\n".join(textwrap.wrap(str(text), width=width, break_long_words=False)) or str(text)


def _series(values):
    import pandas as pd

    return pd.Series(list(values), dtype=object)

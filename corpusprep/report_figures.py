"""The report's figures: plain numbers in, one inline SVG string out.

Every function here takes data already read from an output folder (no file
access) and returns the text of one ``<svg>`` element, ready to be placed
inside an HTML page. matplotlib is imported inside :func:`_figure_svg` so
importing this module costs nothing.

Output is deterministic: the figure is drawn with ``svg.hashsalt`` fixed
(matplotlib otherwise salts the ids of clip paths and markers with random
bytes), no creation date or creator in the metadata, text kept as ``<text>``
elements (``svg.fonttype = "none"``: smaller files, and the labelled values
can be read back from the page), and the ids inside the SVG are prefixed with
the figure's name so several figures can share one HTML document without
clashing ids.

Colours are the Okabe-Ito palette (Okabe & Ito, "Color Universal Design",
2008), which stays distinguishable for the common colour-vision deficiencies;
every bar also has a black edge and a printed value, so a grey print still
reads.
"""

from __future__ import annotations

import io
import math
import re
from collections.abc import Callable, Mapping, Sequence
from typing import TYPE_CHECKING, Any

import numpy as np

if TYPE_CHECKING:
    from matplotlib.axes import Axes
    from matplotlib.figure import Figure

__all__ = [
    "FATE_COLOURS",
    "OKABE_ITO",
    "SPLIT_COLOURS",
    "audit_figure",
    "cluster_figure",
    "fates_figure",
    "lengths_figure",
    "splits_figure",
    "token_rank_figure",
]

#: Okabe-Ito colours by name.
OKABE_ITO = {
    "orange": "#E69F00",
    "sky_blue": "#56B4E9",
    "bluish_green": "#009E73",
    "yellow": "#F0E442",
    "blue": "#0072B2",
    "vermillion": "#D55E00",
    "reddish_purple": "#CC79A7",
    "black": "#000000",
}
SPLIT_COLOURS = {
    "train": OKABE_ITO["blue"],
    "validation": OKABE_ITO["orange"],
    "test": OKABE_ITO["bluish_green"],
}
FATE_COLOURS = {
    "kept": OKABE_ITO["bluish_green"],
    "exact_copy": OKABE_ITO["sky_blue"],
    "near_copy": OKABE_ITO["blue"],
    "empty": OKABE_ITO["yellow"],
    "rejected": OKABE_ITO["vermillion"],
}
_OTHER = OKABE_ITO["reddish_purple"]
_SALT = "corpusprep-report"
_STYLE: Any = {
    "svg.hashsalt": _SALT,
    "svg.fonttype": "none",
    "font.size": 9,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.titlesize": 10,
    "axes.titleweight": "bold",
    "figure.dpi": 72,
}
_METADATA = {"Date": None, "Creator": None, "Format": None, "Type": None}
_ID = re.compile(r'\bid="([^"]+)"')


def split_colour(split: str) -> str:
    """The colour of ``split`` (purple for a split name the project does not define).

    >>> split_colour("train"), split_colour("extra")
    ('#0072B2', '#CC79A7')
    """
    return SPLIT_COLOURS.get(split, _OTHER)


def prefix_ids(svg: str, prefix: str) -> str:
    """Give every ``id`` of ``svg`` (and every reference to it) the prefix ``prefix-``.

    >>> prefix_ids('<g id="a"><use xlink:href="#a"/><path clip-path="url(#a)"/></g>', "f")
    '<g id="f-a"><use xlink:href="#f-a"/><path clip-path="url(#f-a)"/></g>'
    """
    names = set(_ID.findall(svg))
    if not names:
        return svg
    pattern = re.compile(r'(\bid="|href="#|url\(#)(' + "|".join(re.escape(n) for n in names) + r')(?=["\)])')
    return pattern.sub(lambda match: f"{match.group(1)}{prefix}-{match.group(2)}", svg)


def _figure_svg(
    name: str, width: float, height: float, draw: Callable[[Figure], None], *, left: float = 0.7
) -> str:
    """Draw a ``width`` x ``height`` inch figure with ``draw`` and return its ``<svg>`` element.

    Margins are fixed in inches (``left`` for the y labels) rather than found by
    matplotlib's layout engines, which measure every text twice and made the
    figures several times slower to draw.
    """
    import matplotlib
    from matplotlib.figure import Figure

    with matplotlib.rc_context(_STYLE):
        figure = Figure(figsize=(width, height))
        figure.subplots_adjust(
            left=left / width, right=1 - 0.15 / width, bottom=0.55 / height, top=1 - 0.5 / height, wspace=0.35
        )
        draw(figure)
        buffer = io.StringIO()
        figure.savefig(buffer, format="svg", metadata=_METADATA)
    text = buffer.getvalue()
    start = text.index("<svg")
    svg = text[start:].strip()
    svg = svg.replace("<svg ", f'<svg role="img" aria-label="{name}" ', 1)
    return prefix_ids(svg, name)


def _text_inches(labels: Sequence[str]) -> float:
    """Room in inches for the longest of ``labels`` as 9-point y tick labels (a fixed estimate).

    >>> _text_inches(["kept", "rejected: binary_file"])
    1.565
    """
    return round(0.2 + 0.065 * max((len(label) for label in labels), default=4), 3)


def compact_number(value: float) -> str:
    """A short label for a positive axis value.

    >>> [compact_number(v) for v in (1, 10, 1500, 100000, 2e6)]
    ['1', '10', '1.5k', '100k', '2M']
    """
    for limit, suffix in ((1e9, "G"), (1e6, "M"), (1e3, "k")):
        if value >= limit:
            return f"{value / limit:g}{suffix}"
    return f"{value:g}"


def _log_axis(axes: Axes, which: str) -> None:
    """Put the ``which`` ("x" or "y") axis of ``axes`` on a log scale with plain-number labels.

    matplotlib's default log labels are mathtext (``10^{2}``), whose parser
    dominated the drawing time; plain numbers are as clear and cheap.
    """
    from matplotlib.ticker import FuncFormatter, LogLocator, NullLocator

    if which == "x":
        axes.set_xscale("log")
    else:
        axes.set_yscale("log")
    axis = axes.xaxis if which == "x" else axes.yaxis
    axis.set_major_locator(LogLocator(base=10, numticks=6))
    axis.set_major_formatter(FuncFormatter(lambda value, _position: compact_number(value)))
    axis.set_minor_locator(NullLocator())  # every tick is an object costing milliseconds to make


def _few_ticks(axes: Axes, logarithmic_x: bool) -> None:
    """At most about four whole-number ticks on y (counts), and on x unless it is logarithmic."""
    axes.locator_params(axis="y", nbins=4, integer=True)
    if not logarithmic_x:
        axes.locator_params(axis="x", nbins=4)


def _label_values(
    axes: Axes,
    positions: Sequence[float],
    values: Sequence[int],
    *,
    horizontal: bool = False,
    gids: Sequence[str] | None = None,
    size: float = 8,
    rotate: bool = False,
) -> None:
    """Print each non-zero value at the end of its bar (plain text artists, cheaper than bar_label)."""
    from matplotlib.transforms import offset_copy

    shift = offset_copy(
        axes.transData,
        fig=axes.get_figure(root=True),
        x=3 if horizontal else 0,
        y=0 if horizontal else 2,
        units="points",
    )
    for index, (position, value) in enumerate(zip(positions, values, strict=True)):
        if not value:
            continue
        x, y = (value, position) if horizontal else (position, value)
        label = axes.text(
            x, y, f"{value:,}", transform=shift, fontsize=size, rotation=90 if rotate else 0,
            ha="left" if horizontal else "center", va="center" if horizontal else "bottom",
        )  # fmt: skip
        if gids is not None:
            label.set_gid(gids[index])


def fates_figure(fates: Sequence[tuple[str, str, int]]) -> str:
    """Horizontal bars: ``(label, status, count)`` per fate of the input records, counts printed."""
    labels = [label for label, _status, _count in fates]
    counts = [count for _label, _status, count in fates]
    colours = [FATE_COLOURS.get(status, _OTHER) for _label, status, _count in fates]

    def draw(figure: Figure) -> None:
        axes = figure.add_subplot()
        positions = np.arange(len(fates))
        axes.barh(positions, counts, color=colours, edgecolor="black", linewidth=0.6)
        keys = [f"value-{label.replace(' ', '_')}" for label in labels]
        _label_values(axes, positions.tolist(), counts, horizontal=True, gids=keys)
        axes.set_yticks(positions, labels)
        axes.invert_yaxis()
        axes.set_xlabel("input records (ledger rows)")
        axes.set_title("What became of every input record")
        axes.set_xlim(0, max(counts, default=1) * 1.15 + 1)

    return _figure_svg("fig-fates", 7.0, 1.1 + 0.3 * max(len(fates), 1), draw, left=_text_inches(labels))


def _bins(values: np.ndarray, count: int = 20) -> tuple[np.ndarray, bool]:
    """Shared bin edges for positive integers: logarithmic when they span more than 100x.

    >>> edges, logarithmic = _bins(np.array([13, 285]))
    >>> len(edges), logarithmic
    (21, False)
    """
    low, high = max(int(values.min()), 1), max(int(values.max()), 1)
    if high / low > 100:
        return np.unique(np.round(np.geomspace(low, high + 1, count + 1))), True
    return np.linspace(low, high + 1, min(count, high + 1 - low) + 1), False


def _centres(edges: np.ndarray, logarithmic: bool) -> list[float]:
    """Middle of each bin as drawn: geometric on a log axis, arithmetic otherwise.

    >>> _centres(np.array([1.0, 3.0, 100.0]), False), _centres(np.array([1.0, 100.0]), True)
    ([2.0, 51.5], [10.0])
    """
    if logarithmic:
        return [round(float(value), 9) for value in np.sqrt(edges[:-1] * edges[1:])]
    return [float(value) for value in (edges[:-1] + edges[1:]) / 2]


def _histogram(values: np.ndarray, edges: np.ndarray) -> np.ndarray:
    """Counts per bin; values below the first edge (zeros on a log axis) go to the first bin.

    >>> _histogram(np.array([0, 1, 2, 9]), np.array([1.0, 5.0, 10.0])).tolist()
    [3, 1]
    """
    heights, _ = np.histogram(np.clip(values, edges[0], edges[-1]), bins=edges)
    return heights


def lengths_figure(tokens_by_split: Mapping[str, np.ndarray], file_bytes: np.ndarray) -> str:
    """Histograms of tokens per kept document, one panel per split, and of input file sizes.

    The ledger only holds token counts measured after cleaning, so the
    "before" panel shows what the output does keep from before reading:
    bytes per input file (a file may hold many records).
    """
    splits = [name for name, values in tokens_by_split.items() if len(values)]
    every = np.concatenate([tokens_by_split[name] for name in splits]) if splits else np.zeros(0, np.int64)

    def draw(figure: Figure) -> None:
        panels = figure.subplots(1, len(splits) + 1, squeeze=False)[0]
        if len(every):
            edges, logarithmic = _bins(every)
            for axes, name in zip(panels, splits, strict=False):
                values = tokens_by_split[name]
                heights = _histogram(values, edges)
                axes.bar(
                    edges[:-1], heights, width=np.diff(edges), align="edge",
                    color=split_colour(name), edgecolor="black", linewidth=0.4,
                )  # fmt: skip
                _label_values(axes, _centres(edges, logarithmic), heights.tolist(), size=6, rotate=True)
                _few_ticks(axes, logarithmic)
                if logarithmic:
                    _log_axis(axes, "x")
                median = float(np.median(values))
                axes.axvline(median, color="black", linestyle="--", linewidth=0.8)
                axes.set_title(f"{name}: {len(values):,} documents\nmedian {median:,.0f} tokens")
                axes.set_xlabel("tokens per document (after cleaning)")
                axes.set_ylim(0, max(int(heights.max()), 1) * 1.25)
            panels[0].set_ylabel("kept documents")
        axes = panels[-1]
        if len(file_bytes):
            edges, logarithmic = _bins(file_bytes)
            heights = _histogram(file_bytes, edges)
            axes.bar(
                edges[:-1], heights, width=np.diff(edges), align="edge",
                color=OKABE_ITO["reddish_purple"], edgecolor="black", linewidth=0.4,
            )  # fmt: skip
            _label_values(axes, _centres(edges, logarithmic), heights.tolist(), size=6, rotate=True)
            _few_ticks(axes, logarithmic)
            if logarithmic:
                _log_axis(axes, "x")
            axes.set_ylim(0, max(int(heights.max()), 1) * 1.25)
        axes.set_title(f"before reading:\n{len(file_bytes):,} input files")
        axes.set_xlabel("bytes per input file (on disk)")
        axes.set_ylabel("files")

    return _figure_svg("fig-lengths", 2.6 * (len(splits) + 1), 2.8, draw)


def cluster_figure(cluster_sizes: np.ndarray, similarities: np.ndarray, threshold: float | None) -> str:
    """Left: how many near-duplicate clusters have each size (log scale). Right: near-copy similarity."""
    sizes, clusters = np.unique(cluster_sizes, return_counts=True)

    def draw(figure: Figure) -> None:
        left, right = figure.subplots(1, 2)
        positions = np.arange(len(sizes))
        left.bar(positions, clusters, color=OKABE_ITO["blue"], edgecolor="black", linewidth=0.6)
        gids = [f"clusters-of-size-{size}" for size in sizes.tolist()]
        _label_values(left, positions.tolist(), clusters.tolist(), gids=gids)
        left.set_xticks(positions, [str(size) for size in sizes.tolist()])
        _log_axis(left, "y")
        left.set_ylim(0.5, max(int(clusters.max(initial=1)), 1) * 3)
        left.set_xlabel("documents in the cluster (representative included)")
        left.set_ylabel("clusters (log scale)")
        left.set_title(f"{len(cluster_sizes):,} near-duplicate clusters")
        if len(similarities):
            low = min(float(similarities.min()), threshold if threshold is not None else 1.0)
            edges = np.linspace(math.floor(low * 40) / 40, 1.0, max(2, round((1.0 - low) * 40) + 2))
            heights, _ = np.histogram(similarities, bins=edges)
            right.bar(
                edges[:-1], heights, width=np.diff(edges), align="edge",
                color=OKABE_ITO["orange"], edgecolor="black", linewidth=0.4,
            )  # fmt: skip
            _label_values(right, _centres(edges, False), heights.tolist(), size=7)
            _few_ticks(right, False)
            right.set_ylim(0, max(int(heights.max()), 1) * 1.2)
        if threshold is not None:
            right.axvline(
                threshold, color="black", linestyle="--", linewidth=0.8, label=f"threshold {threshold:g}"
            )
            right.legend(loc="upper left", frameon=False)
        right.set_xlabel("estimated similarity to the representative")
        right.set_ylabel("near copies")
        right.set_title(f"{len(similarities):,} near copies")

    return _figure_svg("fig-clusters", 7.0, 2.8, draw)


def splits_figure(rows: Sequence[tuple[str, int, int, int]]) -> str:
    """Per split ``(name, documents, tokens, windows)``: three bar panels with values printed."""
    names = [row[0] for row in rows]
    colours = [split_colour(name) for name in names]

    def draw(figure: Figure) -> None:
        panels = figure.subplots(1, 3)
        for column, (axes, title) in enumerate(zip(panels, ("documents", "tokens", "windows"), strict=True)):
            values = [int(row[column + 1]) for row in rows]
            positions = np.arange(len(rows))
            axes.bar(positions, values, color=colours, edgecolor="black", linewidth=0.6)
            _label_values(axes, positions.tolist(), values, gids=[f"{title}-{name}" for name in names])
            axes.locator_params(axis="y", nbins=4, integer=True)
            axes.set_xticks(positions, names)
            axes.set_title(title)
            axes.set_ylim(0, max(values, default=1) * 1.18 + 1)
            axes.ticklabel_format(axis="y", style="plain")

    return _figure_svg("fig-splits", 7.0, 2.6, draw)


def _rank_points(counts: np.ndarray, points: int = 160) -> tuple[np.ndarray, np.ndarray]:
    """Ranks (1-based) and counts at about ``points`` log-spaced ranks, first and last always kept.

    >>> ranks, values = _rank_points(np.array([5, 3, 3, 1]), points=3)
    >>> ranks.tolist(), values.tolist()
    ([1, 2, 4], [5, 3, 1])
    """
    if len(counts) == 0:
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    ranks = np.unique(np.round(np.geomspace(1, len(counts), points)).astype(np.int64))
    return ranks, counts[ranks - 1]


def token_rank_figure(frequencies: Mapping[str, np.ndarray]) -> str:
    """Token frequency against rank on log-log axes, one line per split (counts sorted descending)."""

    def draw(figure: Figure) -> None:
        axes = figure.add_subplot()
        for name, counts in frequencies.items():
            if not len(counts):
                continue
            ranks, values = _rank_points(counts)
            axes.plot(
                ranks, values, color=split_colour(name), linewidth=1.4, marker=".", markersize=3,
                label=f"{name}: {len(counts):,} distinct ids, {int(counts.sum()):,} tokens",
            )  # fmt: skip
            axes.annotate(
                f"{int(counts[0]):,}", (1, int(counts[0])), xytext=(4, 0), textcoords="offset points",
                fontsize=7, color=split_colour(name),
            )  # fmt: skip
        _log_axis(axes, "x")
        _log_axis(axes, "y")
        axes.set_xlabel("rank of the token id (1 = most frequent)")
        axes.set_ylabel("occurrences in the shards")
        axes.set_title("Token frequency by rank (special tokens left out)")
        axes.legend(frameon=False, fontsize=8)
        axes.grid(True, which="major", linewidth=0.3, color="#999999")

    return _figure_svg("fig-ranks", 7.0, 3.4, draw)


def audit_figure(kinds: Sequence[tuple[str, str, int]]) -> str:
    """Findings of an audit: ``(kind, severity, count)`` as horizontal bars, counts printed."""
    colours = {"damage": OKABE_ITO["vermillion"], "leakage": OKABE_ITO["orange"]}

    def draw(figure: Figure) -> None:
        axes = figure.add_subplot()
        positions = np.arange(len(kinds))
        counts = [count for _kind, _severity, count in kinds]
        axes.barh(
            positions, counts, color=[colours.get(severity, _OTHER) for _kind, severity, _count in kinds],
            edgecolor="black", linewidth=0.6,
        )  # fmt: skip
        gids = [f"findings-{kind}" for kind, _severity, _count in kinds]
        _label_values(axes, positions.tolist(), counts, horizontal=True, gids=gids)
        axes.set_yticks(positions, [f"{kind} ({severity})" for kind, severity, _count in kinds])
        axes.invert_yaxis()
        axes.set_xlim(0, max(counts, default=1) * 1.15 + 1)
        axes.set_xlabel("findings")
        axes.set_title("Audit findings by kind")

    names = [f"{kind} ({severity})" for kind, severity, _count in kinds]
    return _figure_svg("fig-audit", 7.0, 1.1 + 0.3 * max(len(kinds), 1), draw, left=_text_inches(names))

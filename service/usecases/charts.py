"""The console's plots, drawn with matplotlib into SVG strings (inlined in the page).

matplotlib is imported inside :func:`_svg` only, so the API and worker processes load
it the first time a console page draws a plot, never at start-up. Figures are built
with ``matplotlib.figure.Figure`` (no pyplot global state, safe in threaded servers)
and the Agg backend is selected for anything that asks for one. Text stays text in
the SVG (``svg.fonttype: none``) and is escaped by matplotlib's SVG writer.

The numbers drawn come from :mod:`service.usecases.console`; nothing here reads
storage.
"""

from __future__ import annotations

import io
from collections.abc import Callable, Sequence
from typing import TYPE_CHECKING, Any

import numpy as np

if TYPE_CHECKING:
    from matplotlib.axes import Axes
    from matplotlib.figure import Figure

# the console's own palette (also in service/ui/static/console.css)
INK = "#2b2a33"
MUTED = "#7b7785"
PAPER = "#fbf8f1"
LEARNED = "#0f766e"  # deep teal: the learned metric
EUCLID = "#b45309"  # burnt orange: the Euclidean baseline
GROUPS = ("#0f766e", "#b45309", "#6d28d9", "#be123c", "#4d7c0f", "#0369a1", "#a16207",
          "#86198f")
MAX_POINTS = 1500  # a larger batch is subsampled for the scatter (fixed seed)
MAX_BARS = 30  # features beyond this many (by weight) are summarised in the title


def _svg(draw: Callable[[Figure], None], width: float, height: float) -> str:
    """Draw on a fresh figure and return its SVG markup without the XML prolog."""
    import matplotlib

    matplotlib.use("Agg")
    from matplotlib.figure import Figure

    style = {"svg.fonttype": "none", "font.family": "sans-serif", "font.size": 9,
             "axes.edgecolor": MUTED, "axes.labelcolor": INK, "text.color": INK,
             "xtick.color": MUTED, "ytick.color": MUTED, "axes.spines.top": False,
             "axes.spines.right": False, "figure.facecolor": PAPER,
             "axes.facecolor": PAPER, "savefig.facecolor": PAPER}
    with matplotlib.rc_context(style):  # type: ignore[arg-type]  # keys are rc names
        fig = Figure(figsize=(width, height), layout="constrained")
        draw(fig)
        buf = io.StringIO()
        fig.savefig(buf, format="svg")
    text = buf.getvalue()
    return text[text.index("<svg"):]


def versions_chart(versions: Sequence[dict[str, Any]], active: int | None) -> str:
    """Held-out ARI of each version (on its own cross-validation folds) and of
    Euclidean k-means on the same folds, by version number."""
    ns = [int(v["version"]) for v in versions]
    ari = [float(v["score"]["ari"]) for v in versions]
    base = [float(v["score"]["baseline_ari"]) for v in versions]

    def draw(fig: Figure) -> None:
        ax = fig.add_subplot()
        ax.plot(ns, base, color=EUCLID, marker="s", linestyle="--", label="Euclidean k-means")
        ax.plot(ns, ari, color=LEARNED, marker="o", label="learned metric")
        if active in ns:
            i = ns.index(active)
            ax.scatter([active], [ari[i]], s=220, facecolors="none", edgecolors=INK,
                       linewidths=1.5, zorder=3, label="serving now")
        ax.set_xticks(ns)
        ax.set_xlabel("version")
        ax.set_ylabel("held-out ARI")
        low = min(min(ari), min(base))
        ax.set_ylim(min(0.0, low - 0.05), 1.02)
        if len(ns) == 1:
            ax.set_xlim(ns[0] - 1, ns[0] + 1)
        ax.grid(axis="y", color="#e7e1d4", linewidth=0.8)
        ax.legend(loc="lower right", frameon=False)

    return _svg(draw, 5.6, 2.8)


def margins_chart(hist: dict[str, Any]) -> str:
    """Shares of records per margin bin: recent groupings against the reference they
    are scored against (the training batches as cross-validation held them out, or
    in sample for older versions), and the in-sample margins as a dashed line when
    the reference is the held-out one (the last bar is everything beyond)."""
    edges = np.asarray(hist["edges"], dtype=float)
    width = float(edges[1] - edges[0]) if edges.size > 1 else 1.0
    lefts = np.append(edges[:-1], edges[-1])  # the overflow bar sits past the last edge
    held_out = hist.get("reference_kind") == "held_out"

    def steps(shares: list[float]) -> tuple[np.ndarray, list[float]]:
        return np.append(lefts, lefts[-1] + width), [*shares, shares[-1]]

    def draw(fig: Figure) -> None:
        ax = fig.add_subplot()
        shown: list[Any] = [ax.bar(
            lefts, hist["reference"], width=width, align="edge", color=EUCLID, alpha=0.35,
            label="training batches held out in cross-validation (reference)" if held_out
            else "training batches, in sample (reference)")]
        if held_out:
            shown += ax.step(*steps(hist["in_sample"]), where="post", color=MUTED,
                             linewidth=1.1, linestyle="--", label="training batches, in sample")
        shown += ax.step(*steps(hist["live"]), where="post", color=LEARNED, linewidth=1.6,
                         label=f"recent groupings ({hist['records']} records)")
        ax.set_xlabel("margin: distance to the runner-up centre minus distance to the own "
                      "centre (the last bar: beyond the last edge)")
        ax.set_ylabel("share of records")
        ax.legend(handles=shown, loc="upper right", frameon=False, fontsize=8)

    return _svg(draw, 11.0, 2.4)


def feature_weights(components: np.ndarray) -> np.ndarray:
    """Each feature's weight in the learned squared distance: the diagonal of
    ``M = LᵀL`` on standardised features, scaled so the weights average 1 (under the
    Euclidean baseline every weight is 1). All zeros for a zero map."""
    diag = np.einsum("rj,rj->j", components, components)
    total = diag.sum()
    return diag * (diag.size / total) if total > 0 else diag


def weights_chart(features: Sequence[str], weights: np.ndarray) -> str:
    """Horizontal bars keyed by feature name, the heaviest at the top."""
    order = np.argsort(-weights, kind="stable")
    dropped = max(0, len(order) - MAX_BARS)
    order = order[:MAX_BARS]
    names = [features[j] for j in order][::-1]
    values = weights[order][::-1]

    def draw(fig: Figure) -> None:
        ax = fig.add_subplot()
        ax.barh(range(len(names)), values, color=LEARNED, height=0.65)
        ax.axvline(1.0, color=EUCLID, linestyle="--", linewidth=1.2,
                   label="Euclidean: every weight 1")
        ax.legend(loc="lower right", frameon=False, fontsize=8)
        ax.set_yticks(range(len(names)), names)
        ax.set_xlabel("weight (diag of M on standardised features, mean 1)")
        ax.set_ylim(-0.6, len(names) - 0.4 + 0.6)
        if dropped:
            ax.set_title(f"{len(names)} heaviest features; {dropped} lighter ones not shown",
                         fontsize=8, color=MUTED, loc="left")

    return _svg(draw, 5.0, 0.6 + 0.28 * max(len(names), 3))


def _plane(Y: np.ndarray) -> np.ndarray:
    """The first two principal axes of ``Y`` (n × p); a missing axis is zeros."""
    from sklearn.decomposition import PCA

    n, p = Y.shape
    k = min(2, p, n)
    out = np.zeros((n, 2))
    if k > 0:
        out[:, :k] = PCA(n_components=k).fit_transform(Y)
    return out


def projections(standardised: np.ndarray, learned: np.ndarray, labels: Sequence[Any]) -> dict:
    """2-D coordinates of one batch under both metrics: the principal plane of the
    standardised records (what Euclidean k-means sees) and of their images in the
    learned space; group codes index the sorted distinct labels."""
    names, codes = np.unique(np.asarray([str(v) for v in labels]), return_inverse=True)
    return {"euclidean": _plane(standardised), "learned": _plane(learned),
            "codes": codes, "groups": [str(g) for g in names]}


def projection_chart(plane: dict) -> str:
    """Two scatter plots side by side, coloured by the analysts' groups."""
    codes = plane["codes"]
    idx = np.arange(codes.size)
    if codes.size > MAX_POINTS:
        idx = np.sort(np.random.default_rng(0).choice(codes.size, MAX_POINTS, replace=False))
    colours = np.asarray([GROUPS[c % len(GROUPS)] for c in codes[idx]])

    def panel(ax: Axes, xy: np.ndarray, title: str) -> None:
        ax.scatter(xy[idx, 0], xy[idx, 1], c=colours, s=14, linewidths=0.3,
                   edgecolors=PAPER)
        ax.set_title(title, fontsize=9, loc="left")
        ax.set_xticks([])
        ax.set_yticks([])
        ax.set_aspect("equal", adjustable="datalim")

    def draw(fig: Figure) -> None:
        left, right = fig.subplots(1, 2)
        panel(left, plane["learned"], "learned space")
        panel(right, plane["euclidean"], "Euclidean (standardised)")
        shown = plane["groups"][:len(GROUPS)]
        handles = [left.scatter([], [], c=GROUPS[i], s=18) for i in range(len(shown))]
        fig.legend(handles, shown, loc="outside lower center", ncols=min(len(shown), 8),
                   frameon=False, title="analysts' groups", title_fontsize=8)

    return _svg(draw, 6.4, 3.1)

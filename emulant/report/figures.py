"""SVG figures for the report, drawn with matplotlib and inlined in the page.

Deterministic output: ``svg.hashsalt`` is fixed, no date or creator is written, text stays text
(``svg.fonttype: none``), and the XML prolog, DOCTYPE (an external DTD link) and metadata block
are removed, so a rerun on the same results gives the same bytes. Element ids get a per-figure
prefix so several figures can live in one page. Colours: the Okabe–Ito palette (Okabe & Ito,
2008, "Color Universal Design"), safe for the common colour-vision deficiencies.
"""

from __future__ import annotations

import io
import re
from collections.abc import Sequence

import matplotlib

matplotlib.use("Agg")
from matplotlib.figure import Figure  # noqa: E402

OKABE_ITO = ("#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00", "#56B4E9", "#F0E442",
             "#000000")
ARM_COLOURS = ("#0072B2", "#D55E00")
MARKERS = ("o", "s", "^", "D")

RC = {
    "svg.fonttype": "none",
    "svg.hashsalt": "emulant-report",
    "font.family": "sans-serif",
    "font.sans-serif": ["DejaVu Sans"],
    "font.size": 9,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.edgecolor": "#444444",
    "axes.labelcolor": "#222222",
    "xtick.color": "#444444",
    "ytick.color": "#444444",
    "hatch.color": "#666666",
    "path.simplify": False,
}


def to_svg(fig: Figure, prefix: str) -> str:
    """Serialise a figure to inline SVG markup with ids prefixed by ``prefix``."""
    buf = io.StringIO()
    with matplotlib.rc_context(RC):
        fig.savefig(buf, format="svg", metadata={"Date": None, "Creator": None, "Format": None,
                                                 "Type": None})
    svg = buf.getvalue()
    svg = re.sub(r"<\?xml[^>]*\?>\s*", "", svg)
    svg = re.sub(r"<!DOCTYPE[^>]*>\s*", "", svg)
    svg = re.sub(r"<metadata>.*?</metadata>\s*", "", svg, flags=re.S)
    svg = re.sub(r'\s+xmlns(:\w+)?="[^"]*"', "", svg)
    svg = re.sub(r'\sid="([^"]+)"', lambda m: f' id="{prefix}-{m.group(1)}"', svg)
    svg = re.sub(r'href="#([^"]+)"', lambda m: f'href="#{prefix}-{m.group(1)}"', svg)
    svg = re.sub(r"url\(#([^)]+)\)", lambda m: f"url(#{prefix}-{m.group(1)})", svg)
    svg = svg.replace("<svg ", '<svg role="img" ', 1)
    return svg.strip()


def _t(s: object) -> str:
    """Text for matplotlib: a literal ``$`` must not start mathtext."""
    return str(s).replace("$", r"\$")


def _figure(width: float, height: float) -> Figure:
    with matplotlib.rc_context(RC):
        return Figure(figsize=(width, height), layout="constrained")


def attrition_figure(steps: Sequence[dict], prefix: str = "fig-attrition") -> str:
    """Flow of persons through eligibility: one box per step, exclusions to the side.

    ``steps`` holds dicts with ``description``, ``remaining`` and ``excluded`` already formatted
    under the disclosure rule (box sizes never encode counts).
    """
    n = len(steps)
    with matplotlib.rc_context(RC):
        fig = _figure(6.0, 0.62 * n + 0.3)
        ax = fig.add_subplot()
        ax.set_xlim(0, 10)
        ax.set_ylim(-n + 0.4, 0.6)
        ax.axis("off")
        box = {"boxstyle": "round,pad=0.35", "fc": "#EEF4FA", "ec": "#0072B2", "lw": 0.8}
        xbox = {"boxstyle": "round,pad=0.3", "fc": "#FDF1E8", "ec": "#D55E00", "lw": 0.8}
        for i, s in enumerate(steps):
            y = -i
            ax.text(3.2, y, _t(f"{s['description']}\n{s['remaining']} remaining"), ha="center",
                    va="center", fontsize=9, bbox=box, wrap=True)
            if i > 0:
                ax.annotate("", xy=(3.2, y + 0.28), xytext=(3.2, y + 0.72),
                            arrowprops={"arrowstyle": "->", "color": "#444444", "lw": 0.8})
                if s["excluded"] not in ("", "0"):
                    ax.annotate("", xy=(6.4, y + 0.5), xytext=(3.2, y + 0.5),
                                arrowprops={"arrowstyle": "->", "color": "#D55E00", "lw": 0.7})
                    ax.text(6.5, y + 0.5, _t(f"excluded {s['excluded']}"), ha="left", va="center",
                            fontsize=8.5, bbox=xbox)
        return to_svg(fig, prefix)


def smd_dotplot(rows: Sequence[dict], threshold: float, estimands: Sequence[str],
                prefix: str = "fig-smd") -> str:
    """Absolute SMDs per covariate row, before weighting and after each estimand's weights.

    ``rows``: dicts with ``label``, ``before`` (float or None when hidden) and ``after``
    ({estimand: float or None}). A dashed line marks ``threshold``.
    """
    n = max(len(rows), 1)
    with matplotlib.rc_context(RC):
        fig = _figure(6.5, 0.24 * n + 1.4)
        ax = fig.add_subplot()
        ys = list(range(n))[::-1]
        ax.scatter([abs(r["before"]) if r["before"] is not None else float("nan") for r in rows],
                   ys[: len(rows)], marker="o", facecolors="none", edgecolors="#555555",
                   label="before weighting", s=22, zorder=3)
        for k, est in enumerate(estimands):
            vals = [r["after"].get(est) for r in rows]
            dodge = 0.22 * (k + 1) / max(len(estimands), 1)
            ax.scatter([abs(v) if v is not None else float("nan") for v in vals],
                       [y - dodge for y in ys[: len(rows)]],
                       marker=MARKERS[(k + 1) % len(MARKERS)], color=OKABE_ITO[k % 4],
                       label=f"after {est} weighting", s=20, zorder=4)
        ax.axvline(threshold, color="#000000", ls="--", lw=0.8, zorder=2)
        ax.text(threshold, n - 0.4, f" threshold {threshold:g}", fontsize=7.5, va="bottom")
        ax.set_yticks(ys[: len(rows)], [_t(r["label"]) for r in rows], fontsize=7.5)
        ax.set_ylim(-0.7, n - 0.1)
        ax.set_xlabel("absolute standardized mean difference")
        ax.grid(axis="x", color="#DDDDDD", lw=0.5)
        fig.legend(loc="outside lower center", fontsize=7.5, frameon=False,
                   ncols=1 + len(estimands))
        return to_svg(fig, prefix)


def overlap_figure(edges: Sequence[float], arms: Sequence[dict],
                   prefix: str = "fig-overlap") -> str:
    """Propensity distribution by arm as a mirrored histogram (first arm up, second down).

    ``arms``: dicts with ``name``, ``heights`` (drawn heights: counts, or masked heights for
    suppressed bins) and ``hidden`` (bool per bin: drawn hatched).
    """
    with matplotlib.rc_context(RC):
        fig = _figure(6.5, 3.0)
        ax = fig.add_subplot()
        left = list(edges[:-1])
        widths = [b - a for a, b in zip(edges[:-1], edges[1:], strict=True)]
        for k, arm in enumerate(arms[:2]):
            sign = 1 if k == 0 else -1
            colour = ARM_COLOURS[k]
            for x, w, h, hid in zip(left, widths, arm["heights"], arm["hidden"], strict=True):
                ax.bar(x, sign * h, width=w, align="edge", color="white" if hid else colour,
                       edgecolor=colour, hatch="////" if hid else None, lw=0.6,
                       alpha=1.0 if hid else 0.8)
            ax.bar([0], [0], color=colour, label=_t(arm["name"]))
        ax.axhline(0, color="#444444", lw=0.6)
        ax.set_xlim(edges[0], edges[-1])
        ax.set_xlabel("propensity score (probability of the treated arm)")
        ax.set_ylabel("persons (second arm drawn downwards)")
        ticks = ax.get_yticks()
        ax.set_yticks(ticks, [f"{abs(t):,.0f}" for t in ticks])
        ax.legend(loc="upper center", fontsize=8, frameon=False, ncols=2)
        return to_svg(fig, prefix)


def curves_figure(panels: Sequence[dict], prefix: str = "fig-curves",
                  ticks: Sequence[float] = ()) -> str:
    """Cumulative risk per arm in percent, one panel per method, as steps at the drawn days.

    ``panels``: dicts with ``title`` and ``arms`` (dicts with ``name``, ``day``, ``risk``,
    ``lo``, ``hi`` — only the days the disclosure rule lets a step be drawn at). ``ticks``: the
    days of the numbers at risk, so the axis lines up with the table under the figure.
    """
    k = max(len(panels), 1)
    ncols = 2 if k > 1 else 1
    nrows = (k + ncols - 1) // ncols
    with matplotlib.rc_context(RC):
        fig = _figure(7.0, 2.6 * nrows + 0.2)
        axes = fig.subplots(nrows, ncols, squeeze=False, sharey=True)
        for idx, ax in enumerate(axes.flat):
            if idx >= len(panels):
                ax.axis("off")
                continue
            p = panels[idx]
            for j, arm in enumerate(p["arms"]):
                colour = ARM_COLOURS[j % 2]
                if not arm["day"]:
                    continue
                pct = [100 * v for v in arm["risk"]]
                ax.step(arm["day"], pct, where="post", color=colour, lw=1.4,
                        label=_t(arm["name"]))
                if all(v is not None for v in arm["lo"] + arm["hi"]) and arm["lo"]:
                    ax.fill_between(arm["day"], [100 * v for v in arm["lo"]],
                                    [100 * v for v in arm["hi"]], step="post",
                                    color=colour, alpha=0.15, lw=0)
            ax.set_title(_t(p["title"]), fontsize=9, loc="left")
            ax.set_xlabel("days since time zero")
            ax.grid(color="#E5E5E5", lw=0.5)
            if idx % ncols == 0:
                ax.set_ylabel("cumulative risk (%)")
            if ticks:
                every = 2 if len(ticks) > 8 else 1
                ax.set_xticks(list(ticks), [f"{t:,.0f}" if i % every == 0 else ""
                                            for i, t in enumerate(ticks)], fontsize=7.5)
            ax.legend(fontsize=7.5, frameon=False, loc="upper left")
        return to_svg(fig, prefix)

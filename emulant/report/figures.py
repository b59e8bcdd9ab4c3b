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
import matplotlib.lines  # noqa: E402
import matplotlib.patches  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402

OKABE_ITO = ("#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00", "#56B4E9", "#F0E442",
             "#000000")
ARM_COLOURS = ("#0072B2", "#D55E00")

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


def balance_figure(rows: Sequence[dict], threshold: float, estimands: Sequence[str],
                   prefix: str = "fig-balance") -> str:
    """Standardized mean differences before and after weighting, one band per covariate row.

    For each row and estimand an arrow runs from the unweighted SMD to the weighted one (signed,
    treated minus comparator); rows are sorted by the size of the unweighted imbalance, largest
    on top; the acceptable range ``|SMD| <= threshold`` is a shaded band. ``rows``: dicts with
    ``label``, ``before`` (float, or None when hidden under the disclosure rule: then only the
    weighted end is drawn) and ``after`` ({estimand: float or None}).
    """
    order = sorted(rows, key=lambda r: -abs(r["before"]) if r["before"] is not None else 0.0)
    n = max(len(order), 1)
    k = max(len(estimands), 1)
    with matplotlib.rc_context(RC):
        fig = _figure(6.5, 0.3 * n + 1.3)
        ax = fig.add_subplot()
        ax.axvspan(-threshold, threshold, color="#E3F1EA", lw=0, zorder=0)
        ax.axvline(0, color="#9A9A9A", lw=0.6, zorder=1)
        ys = list(range(n))[::-1]
        span = 0.5 if k > 1 else 0.0
        for y, r in zip(ys, order, strict=False):
            if y % 2:
                ax.axhspan(y - 0.5, y + 0.5, color="#F6F6F8", lw=0, zorder=0.5)
            for j, est in enumerate(estimands):
                after = r["after"].get(est)
                yy = y + (span / 2 - span * j / max(k - 1, 1) if k > 1 else 0.0)
                colour = OKABE_ITO[(2 * j) % len(OKABE_ITO)]
                if after is None:
                    continue
                if r["before"] is not None:
                    ax.annotate("", xy=(after, yy), xytext=(r["before"], yy), zorder=3,
                                arrowprops={"arrowstyle": "-|>,head_length=0.35,head_width=0.18",
                                            "color": colour, "lw": 1.1, "shrinkA": 0,
                                            "shrinkB": 0})
                ax.plot([after], [yy], marker="|", ms=7, mew=1.6, color=colour, zorder=4)
            if r["before"] is not None:
                ax.plot([r["before"]], [y], marker="|", ms=9, mew=1.0, color="#555555",
                        zorder=2)
        ax.set_yticks(ys[: len(order)], [_t(r["label"]) for r in order], fontsize=7.5)
        ax.tick_params(axis="y", length=0)
        ax.spines["left"].set_visible(False)
        ax.set_ylim(-0.6, n - 0.4)
        ax.set_xlabel("standardized mean difference (treated minus comparator)")
        ax.grid(axis="x", color="#E2E2E2", lw=0.5)
        handles = [matplotlib.patches.Patch(color="#E3F1EA", label=f"|SMD| ≤ {threshold:g}")]
        handles += [matplotlib.lines.Line2D([], [], color=OKABE_ITO[(2 * j) % len(OKABE_ITO)],
                                            lw=1.1, label=f"unweighted → {est} weights")
                    for j, est in enumerate(estimands)]
        fig.legend(handles=handles, loc="outside lower center", fontsize=7.5, frameon=False,
                   ncols=1 + len(estimands))
        return to_svg(fig, prefix)


def overlap_figure(edges: Sequence[float], arms: Sequence[dict], weighted: Sequence[dict] = (),
                   weighted_title: str = "", prefix: str = "fig-overlap") -> str:
    """Propensity scores by arm as outline densities on one axis; the bins outside the common
    support (where either arm has no person) shaded; beside it, the same after weighting.

    ``arms``: dicts with ``name``, ``heights`` (counts, or masked heights for suppressed bins)
    and ``hidden`` (bool per bin: hatched under the outline). ``weighted``: the same dicts with
    weighted masses per bin (may be empty: one panel only).
    """
    panels = [("before weighting", arms)] + ([(weighted_title or "after weighting", weighted)]
                                             if weighted else [])
    both = [i for i in range(len(edges) - 1)
            if all(a["heights"][i] > 0 for a in arms[:2])]
    lo = edges[both[0]] if both else edges[0]
    hi = edges[both[-1] + 1] if both else edges[-1]
    with matplotlib.rc_context(RC):
        fig = _figure(7.0, 2.6)
        axes = fig.subplots(1, len(panels), sharey=True, squeeze=False)[0]
        for ax, (title, data) in zip(axes, panels, strict=True):
            for k, arm in enumerate(data[:2]):
                colour = ARM_COLOURS[k]
                tot = sum(arm["heights"]) or 1.0
                dens = [h / tot for h in arm["heights"]]
                ax.stairs(dens, edges, color=colour, lw=1.5, label=_t(arm["name"]),
                          ls="-" if k == 0 else (0, (4, 1.5)))
                for i, hid in enumerate(arm["hidden"]):
                    if hid:
                        ax.fill_between([edges[i], edges[i + 1]], 0, dens[i], facecolor="none",
                                        edgecolor=colour, hatch="////", lw=0)
            if lo > edges[0]:
                ax.axvspan(edges[0], lo, color="#DADADA", alpha=0.6, lw=0, zorder=0)
            if hi < edges[-1]:
                ax.axvspan(hi, edges[-1], color="#DADADA", alpha=0.6, lw=0, zorder=0)
            ax.set_xlim(edges[0], edges[-1])
            ax.set_title(_t(title), fontsize=9, loc="left")
            ax.set_xlabel("propensity score")
            ax.grid(axis="y", color="#EAEAEA", lw=0.5)
        axes[0].set_ylabel("share of the arm per bin")
        axes[0].legend(fontsize=7.5, frameon=False, loc="upper right")
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


def on_protocol_figure(arms: Sequence[dict], prefix: str = "fig-on-protocol") -> str:
    """Share still on protocol among those under follow-up, per arm, by period start day.

    ``arms``: dicts with ``name``, ``day`` and ``share`` (lists, already cut where a period has
    too few persons to show).
    """
    with matplotlib.rc_context(RC):
        fig = _figure(7.0, 2.6)
        ax = fig.subplots()
        for j, arm in enumerate(arms):
            if arm["day"]:
                ax.step(arm["day"], arm["share"], where="post", color=ARM_COLOURS[j % 2], lw=1.4,
                        label=_t(arm["name"]))
        ax.set_ylim(0, 1.02)
        ax.set_xlabel("days since time zero (period start)")
        ax.set_ylabel("share on protocol")
        ax.grid(color="#E5E5E5", lw=0.5)
        ax.legend(fontsize=7.5, frameon=False, loc="lower left")
        return to_svg(fig, prefix)

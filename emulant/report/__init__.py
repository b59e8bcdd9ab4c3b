"""The self-contained HTML report a reviewer can audit.

``render_report(results_dir, protocol, out_html, manifest=None, comparison=None, design=False)``
reads the results files of one run (CONTRACTS §4), builds the context in Python
(:mod:`emulant.report.context`), and renders ``templates/report.html.j2`` with jinja2
(autoescape on) into one file: inline CSS, inline SVG figures, no script, no external link.
With ``design=True`` it renders the outcome-blind design report: no outcome file is opened.
"""

from __future__ import annotations

from pathlib import Path

from jinja2 import Environment, FileSystemLoader, StrictUndefined, select_autoescape
from markupsafe import Markup

from emulant.protocol import Protocol
from emulant.report.context import build_context
from emulant.report.load import ReportError

__all__ = ["ReportError", "build_context", "render_html", "render_report"]

HERE = Path(__file__).parent


def _environment() -> Environment:
    env = Environment(loader=FileSystemLoader(HERE / "templates"),
                      autoescape=select_autoescape(default=True, default_for_string=True),
                      undefined=StrictUndefined, trim_blocks=True, lstrip_blocks=True,
                      keep_trailing_newline=True)
    return env


def render_html(ctx: dict) -> str:
    """Render a context (from :func:`build_context`) to the page's HTML text."""
    env = _environment()
    css = Markup((HERE / "style.css").read_text(encoding="utf-8"))
    svg = {k: (Markup(v) if v else None) for k, v in ctx.items() if k.endswith("_svg")}
    curves = ctx.get("curves") or []
    for c in curves:
        c["svg"] = Markup(c["svg"])
    if ctx.get("decision") and ctx["decision"].get("svg"):
        ctx["decision"]["svg"] = Markup(ctx["decision"]["svg"])
    for panel in (ctx.get("subgroups") or {}).get("panels", []):
        panel["svg"] = Markup(panel["svg"])
    return env.get_template("report.html.j2").render(ctx=ctx, css=css, svg=svg)


def render_report(results_dir: str | Path, protocol: Protocol, out_html: str | Path,
                  manifest: dict | None = None, comparison: dict | None = None,
                  design: bool = False) -> Path:
    """Build the report from ``results_dir`` and write it to ``out_html``; returns the path.

    Raises
    ------
    ReportError
        When a results file exists but cannot be read or lacks a contract column.
    """
    ctx = build_context(results_dir, protocol, manifest, comparison, design)
    html = render_html(ctx)
    out = Path(out_html)
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(html, encoding="utf-8")
    return out

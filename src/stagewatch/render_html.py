"""One self-contained HTML page per view: the plan, a check result, a replay. No script, no fetch, no external font.

Every template under ``templates/html/`` is rendered with Jinja2 autoescaping on, so what a plan or a log holds is
text wherever it lands (HTML, attributes, SVG ``<text>``); free text also goes through ``escape.visible`` (control,
bidi and zero-width characters shown as ``\\u202e``). Colours live in :data:`PALETTE` and reach the page only
through the stylesheet; every verdict also carries a word and a shape (:data:`VERDICTS`), so the page reads the
same in greyscale print and for colour-blind readers. ``tests/test_html.py`` checks the contrast of every text pair
(:data:`TEXT_PAIRS`) against WCAG AA.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any, Sequence

import jinja2

from stagewatch import diagram
from stagewatch.escape import visible
from stagewatch.resources import data_dir
from stagewatch.owned import write_owned
from stagewatch.safewrite import STDOUT, safe_write

PALETTE = {
    "ink": "#1a1a1a", "muted": "#4a4a4a", "paper": "#ffffff", "panel": "#f4f6f8", "line": "#767676",
    "ok": "#006b47", "warn": "#8f5300", "critical": "#b3001b", "insufficient": "#5b3f8c", "not_measured": "#595959",
    "ok_bg": "#e6f4ee", "warn_bg": "#fff4e0", "critical_bg": "#fde8ea", "insufficient_bg": "#efeaf7",
    "not_measured_bg": "#eeeeee", "reference": "#767676", "reference_fill": "#e0e0e0", "window": "#005a9c",
}
_BACKGROUNDS = ("paper", "panel", "reference_fill", "ok_bg", "warn_bg", "critical_bg", "insufficient_bg",
                "not_measured_bg")
# (text colour, background) of every text style the pages use: contrast must reach 4.5:1 (WCAG 2.x AA). Body and
# muted text can sit on any background (a stage box takes its verdict's tint); a verdict's word sits on the page
# or its own tint; the "likely origin" tag sits on any stage's tint.
TEXT_PAIRS = [(fg, bg) for fg in ("ink", "muted", "critical") for bg in _BACKGROUNDS] + [
    (v, bg) for v in ("ok", "warn", "insufficient", "not_measured", "window") for bg in ("paper", f"{v}_bg")
    if bg in PALETTE]
# shapes and bars against the page: 3:1 is the non-text contrast WCAG 2.1 asks of graphics (SC 1.4.11)
GRAPHIC_PAIRS = [("line", "paper"), ("reference", "paper"), ("window", "paper")] + [
    (v, "paper") for v in ("ok", "warn", "critical", "insufficient", "not_measured")]

# a word and a shape for each verdict, so colour is never the only signal (paths centred on 0,0, about 12 across)
SHAPES = {
    "circle": "M0,-5.5A5.5,5.5 0 1 1 0,5.5A5.5,5.5 0 1 1 0,-5.5Z",
    "triangle": "M0,-6.5L6.5,5.5L-6.5,5.5Z",
    "diamond": "M0,-7L7,0L0,7L-7,0Z",
    "ring": "M0,-5.5A5.5,5.5 0 1 1 0,5.5A5.5,5.5 0 1 1 0,-5.5ZM0,-3A3,3 0 1 0 0,3A3,3 0 1 0 0,-3Z",
    "bar": "M-6,-2H6V2H-6Z",
}
VERDICTS = {
    "ok": ("ok", "circle"), "warn": ("warn", "triangle"), "critical": ("critical", "diamond"),
    "insufficient": ("insufficient", "ring"), "not_measured": ("not measured", "bar"),
}


def environment() -> jinja2.Environment:
    env = jinja2.Environment(loader=jinja2.FileSystemLoader(str(data_dir("templates") / "html")),
                             autoescape=True, trim_blocks=True, lstrip_blocks=True)
    from stagewatch.render import threshold

    env.filters.update(text=visible, num=_num, th=threshold, stat=_stat_name)
    env.globals.update(palette=PALETTE, shapes=SHAPES, verdicts=VERDICTS)
    return env


def _num(x: Any) -> str:
    from stagewatch.data.report import fmt

    return fmt(x)


def _stat_name(name: str) -> str:
    from stagewatch.render import STATISTIC_NAMES

    return STATISTIC_NAMES.get(name, name)


def page(template: str, **context: Any) -> str:
    return environment().get_template(template).render(**context)


def render_plan_html(plan: dict[str, Any]) -> str:
    """The plan as one HTML page: summary, the pipeline diagram, open decisions, then each stage in detail."""
    from stagewatch.render import context

    ctx = context(plan)
    return page("plan.html.j2", diagram=diagram.build(plan), sides=diagram.handoff_sides(plan), **ctx)


def render(plan: dict[str, Any], out_dir: str | Path, inputs: Sequence[str | Path] = (),
           force: bool = False) -> list[Path]:
    """Write ``out_dir/plan.html`` (``-``: standard output); returns the files written. A file edited by hand is
    not written over unless ``force`` (see ``owned.py``)."""
    text = render_plan_html(plan)
    if str(out_dir) == STDOUT:
        safe_write(STDOUT, text)
        return []
    target = Path(out_dir) / "plan.html"
    write_owned(out_dir, {target: text}, kind="render-html", inputs=inputs, force=force)
    return [target]

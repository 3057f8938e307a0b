"""The HTML pages: well-formed (html5lib, strict; each SVG also as XML), self-contained, every stage and hand-off
drawn, hostile text inert, the distributions drawn equal to numpy on the raw rows, and text contrast at WCAG AA."""

from __future__ import annotations

import json
import re
import xml.etree.ElementTree as ET

import duckdb
import html5lib
import numpy as np
import pytest
import yaml

from conftest import SMALL, all_pipelines
from datagen import T0, data_args, write_declared_logs
from stagewatch.cli import main
from stagewatch.plan import compose
from stagewatch.render_html import GRAPHIC_PAIRS, PALETTE, SHAPES, TEXT_PAIRS, VERDICTS, render_plan_html
from stagewatch.spec import load_pipeline
from test_data_check import COLD_STORE, REF_END

DAY = 86400.0


def parse(text: str):
    """Parse strictly (any HTML parse error raises) and return the element tree, plus every SVG parsed as XML."""
    tree = html5lib.HTMLParser(strict=True, namespaceHTMLElements=False).parse(text)
    svgs = [ET.fromstring(s) for s in re.findall(r"<svg\b.*?</svg>", text, flags=re.S)]
    return tree, svgs


def assert_self_contained(text: str, tree) -> None:
    assert "http:" not in text and "https:" not in text
    for tag in ("script", "link", "img", "iframe", "object", "embed", "audio", "video", "source", "base", "form",
                "foreignObject", "image", "use"):
        assert not every(tree, tag), tag
    for element in tree.iter():
        for name, value in element.attrib.items():
            assert not name.lower().startswith("on"), (element.tag, name)  # no event handlers
            if name.split("}")[-1] in ("href", "src", "action"):
                assert value.startswith("#"), (element.tag, name, value)
    style = "".join(s.text or "" for s in every(tree, "style"))
    assert "@import" not in style and "@font-face" not in style
    assert re.findall(r"url\(([^)]*)\)", style + text) == re.findall(r"url\((#[\w-]+)\)", style + text)


def every(tree, name: str) -> list:
    """Elements by local name, HTML or SVG (html5lib puts SVG elements in the SVG namespace)."""
    return [e for e in tree.iter() if isinstance(e.tag, str) and e.tag.split("}")[-1] == name]


def stage_groups(tree) -> dict[str, dict]:
    return {g.get("data-stage"): g for g in every(tree, "g") if g.get("data-stage") is not None}


def edge_groups(tree) -> set[tuple[str, str]]:
    return {(g.get("data-from"), g.get("data-to")) for g in every(tree, "g") if g.get("data-from") is not None}


def texts(element) -> str:
    return " ".join(t.strip() for t in element.itertext() if t.strip())


@pytest.mark.parametrize("path", all_pipelines(), ids=lambda p: p.stem)
def test_every_stage_and_hand_off_is_drawn_with_its_counts(path):
    plan = compose(load_pipeline(str(path)))
    text = render_plan_html(plan)
    tree, svgs = parse(text)
    assert_self_contained(text, tree)
    stages = stage_groups(tree)
    assert set(stages) == {s["id"] for s in plan["stages"]}
    assert edge_groups(tree) == {(u, s["id"]) for s in plan["stages"] for u in s.get("upstream", [])}
    for s in plan["stages"]:
        live = [m for m in s["metrics"] if m["status"] in ("proposed", "accepted")]
        counts = {layer: sum(1 for m in live if m["layer"] == layer) for layer in ("software", "input", "output")}
        words = texts(stages[s["id"]])
        assert f"software {counts['software']} · input {counts['input']} · output {counts['output']}" in words
        pages = sum(1 for m in live if m["severity"] == "page")
        assert f"page {pages} · ticket {len(live) - pages}" in words
        assert s["kind"] in words
    details = tree.findall(".//details")
    assert len(details) == len(plan["stages"]) + 1
    headings = [texts(h) for h in every(tree, "h2")]
    assert headings.index("Open decisions") < headings.index("Stages")  # open decisions first
    assert any(svg.get("class") == "pipeline" for svg in svgs)


def test_render_writes_html_on_request_and_markdown_by_default(tmp_path, write):
    description = write("pipeline.yaml", SMALL)
    plan = tmp_path / "plan.yaml"
    assert main(["propose", str(description), "-o", str(plan)]) == 0
    assert main(["render", str(plan), "-o", str(tmp_path / "md")]) == 0
    assert (tmp_path / "md" / "plan.md").exists() and not (tmp_path / "md" / "plan.html").exists()
    assert main(["render", str(plan), "-o", str(tmp_path / "html"), "--format", "html"]) == 0
    text = (tmp_path / "html" / "plan.html").read_text(encoding="utf-8")
    tree, _ = parse(text)
    assert_self_contained(text, tree)


HOSTILE = "</title><script>alert(1)</script><img src=x onerror=alert(2)> \"quoted\" 'single' & \u202e \x1b[31m"


def test_hostile_text_from_a_plan_stays_text(write, tmp_path):
    description = SMALL.replace("context: business\n", "context: business\ndescription: " + json.dumps(HOSTILE) + "\n")
    description = description.replace("  - id: scorer\n", "  - id: scorer\n    description: " + json.dumps(HOSTILE) + "\n")
    plan = compose(load_pipeline(str(write("p.yaml", description))))
    plan["stages"][1]["metrics"][0]["note"] = HOSTILE
    plan["stages"][1]["metrics"][0]["review"] = "<svg onload=alert(3)>"
    text = render_plan_html(plan)
    tree, _ = parse(text)
    assert_self_contained(text, tree)
    assert "<script>" not in text and "<img" not in text and "<svg onload" not in text
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in text
    assert "\u202e" not in text and "\x1b" not in text  # shown as \u202e and \x1b escapes
    assert "\\u202e" in text and "\\x1b[31m" in text
    body = texts(tree.find(".//main"))
    assert "<img src=x onerror=alert(2)>" in body  # what the person typed, as text


# --- check and replay pages ------------------------------------------------------------------------------------

HOSTILE_STORE = COLD_STORE.replace("categories: [r1, r2, r3, r4]", 'categories: [r1, "<b>r2</b>", "r3&amp;", r4]')


@pytest.fixture(scope="module")
def shifted(tmp_path_factory):
    """The cold store with a +3 degree shift at the probe from day 13, calibrated on the first 12 days."""
    work = tmp_path_factory.mktemp("html")
    (work / "pipeline.yaml").write_text(HOSTILE_STORE)
    plan = work / "plan.yaml"
    assert main(["propose", str(work / "pipeline.yaml"), "-o", str(plan)]) == 0
    changes = {(s, "temp_c"): (T0 + 13 * DAY, lambda v: v + 3.0) for s in ("probe", "spoilage_model")}
    paths = write_declared_logs(yaml.safe_load(plan.read_text()), work / "logs", changes=changes)
    assert main(["calibrate", str(plan), *data_args(paths), "--to", REF_END, "-o", str(work / "base")]) == 0
    return work, plan, paths


def test_check_page_marks_verdicts_and_origin_and_draws_what_numpy_counts(shifted, capsys):
    work, plan, paths = shifted
    args = ["check", str(plan), "--baseline", str(work / "base"), *data_args(paths)]
    assert main([*args, "--format", "html", "-o", str(work / "check.html")]) == 4
    assert main([*args, "--format", "json", "-o", str(work / "check.json")]) == 4
    doc = json.loads((work / "check.json").read_text())
    text = (work / "check.html").read_text(encoding="utf-8")
    tree, _ = parse(text)
    assert_self_contained(text, tree)
    stages = stage_groups(tree)
    assert "origin" in stages["probe"].get("class") and "origin" not in stages["spoilage_model"].get("class")
    assert "critical" in texts(stages["probe"]) and "likely origin" in texts(stages["probe"])
    sections = {s.get("data-check"): s for s in every(tree, "section") if s.get("class") == "chart"}
    alerting = [c for c in doc["checks"] if c["verdict"] in ("warn", "critical")]
    assert alerting and set(sections) == {c["id"] for c in alerting}
    # the drift histogram of the probe: bar shares equal numpy's on the raw rows of the last window
    drift = next(c for c in alerting if c["id"] == "probe.input.temp_c_drift")
    at = duckdb.connect().execute(f"SELECT epoch(max(timestamp)) FROM '{paths['probe']}'").fetchone()[0]
    from stagewatch import durations

    start = at - durations.parse(drift["window"])
    rows = duckdb.connect().execute(f"SELECT temp_c FROM '{paths['probe']}' WHERE epoch(timestamp) > {start} "
                                    f"AND epoch(timestamp) <= {at} AND isfinite(temp_c)").fetchall()
    values = np.array([r[0] for r in rows])
    edges = np.array(drift["detail"]["edges"])
    counts = np.bincount(np.searchsorted(edges, values, side="right"), minlength=len(edges) + 1)  # [e_i, e_i+1)
    titles = [t.text for t in every(sections[drift["id"]], "title") if t.text and "of the window" in t.text]
    shown = [float(t.split(": ")[1].split("%")[0]) / 100 for t in titles]
    assert np.allclose(shown, counts / counts.sum(), rtol=1e-2, atol=1e-4)
    assert f"{drift['value']:.3g}" in texts(sections[drift["id"]])
    for word in ("warn", "critical", "window " + drift["window"]):
        assert word in texts(sections[drift["id"]])
    # categories from the data are text, in chart labels as everywhere
    assert "<b>r2</b>" not in text and "&lt;b&gt;r2&lt;/b&gt;" in text


def test_replay_page_draws_a_timeline_per_check_whose_bars_are_its_firings(shifted):
    work, plan, paths = shifted
    period = ["--from", "2026-03-14T00:00:00Z", "--to", "2026-03-16T00:00:00Z"]
    base = ["replay", str(plan), "--baseline", str(work / "base"), *data_args(paths), *period]
    main([*base, "--format", "html", "-o", str(work / "replay.html")])
    main([*base, "--format", "json", "-o", str(work / "replay.json")])
    doc = json.loads((work / "replay.json").read_text())
    text = (work / "replay.html").read_text(encoding="utf-8")
    tree, _ = parse(text)
    assert_self_contained(text, tree)
    rows = {tr.get("data-check"): every(tr, "svg")[0] for tr in every(tree, "tr") if tr.get("data-check")}
    assert set(rows) == {c["id"] for c in doc["checks"]}
    assert 0 < sum(1 for c in doc["checks"] if c["critical_firings"]) < len(doc["checks"])
    for c in doc["checks"]:
        svg = rows[c["id"]]
        classes = [r.get("class") for r in every(svg, "rect")]
        assert ("tl-critical" in classes) == (c["critical_firings"] > 0), c["id"]
        assert ("tl-warn" in classes) <= (c["warn_firings"] > 0), c["id"]  # a critical column hides a warn
    assert set(stage_groups(tree)) == {"probe", "spoilage_model"}
    # the budget badge judges pages and tickets: the shift fires tickets far over their budget (150 a week against
    # 5) while no page fires, so the badge is amber and says so, never a green "within budget"
    figures = doc["pipeline"]
    assert figures["pages_per_week"] <= figures["budget_pages_per_week"]
    assert figures["tickets_per_week"] > figures["budget_tickets_per_week"]
    budget = next(span for span in every(tree, "span") if span.get("class") == "budget")
    badge = next(b for b in every(budget, "span") if b is not budget)
    assert badge.get("class") == "badge v-warn"
    assert texts(badge).strip() == "tickets over budget, pages within"


# --- colour: every verdict has a word and a shape; contrast at WCAG AA ---------------------------------------

def relative_luminance(hex_colour: str) -> float:
    """WCAG 2.x relative luminance (W3C, Web Content Accessibility Guidelines 2.1, definition "relative
    luminance"): sRGB channels linearised with the 0.04045 / 12.92 / 2.4 rule, weighted 0.2126, 0.7152, 0.0722."""
    channels = [int(hex_colour[i:i + 2], 16) / 255 for i in (1, 3, 5)]
    r, g, b = [c / 12.92 if c <= 0.04045 else ((c + 0.055) / 1.055) ** 2.4 for c in channels]
    return 0.2126 * r + 0.7152 * g + 0.0722 * b


def contrast(a: str, b: str) -> float:
    """WCAG 2.x contrast ratio (L1 + 0.05) / (L2 + 0.05), lighter over darker."""
    high, low = sorted((relative_luminance(a), relative_luminance(b)), reverse=True)
    return (high + 0.05) / (low + 0.05)


def test_contrast_formula_matches_published_ratios():
    assert contrast("#000000", "#ffffff") == pytest.approx(21.0)  # WCAG 2.1: the ratio ranges from 1 to 21
    assert round(contrast("#767676", "#ffffff"), 2) == 4.54  # WebAIM: the lightest grey passing AA on white
    assert round(contrast("#777777", "#ffffff"), 2) == 4.48  # WebAIM: one step lighter fails


def test_text_meets_wcag_aa_and_graphics_meet_three_to_one():
    for fg, bg in TEXT_PAIRS:
        assert contrast(PALETTE[fg], PALETTE[bg]) >= 4.5, (fg, bg)  # WCAG 2.1 SC 1.4.3, normal text
    for fg, bg in GRAPHIC_PAIRS:
        assert contrast(PALETTE[fg], PALETTE[bg]) >= 3.0, (fg, bg)  # WCAG 2.1 SC 1.4.11, graphical objects
    plan = compose(load_pipeline(str(all_pipelines()[0])))
    style = "".join(s.text or "" for s in every(parse(render_plan_html(plan))[0], "style"))
    text_colours = set(re.findall(r"(?<![-\w])color:\s*(#[0-9a-f]{6})", style))
    text_colours |= set(re.findall(r"svg[^{]*text[^{]*\{[^}]*?fill:\s*(#[0-9a-f]{6})", style))
    assert text_colours <= {PALETTE[fg] for fg, _ in TEXT_PAIRS}  # every text colour is one that was measured


def test_every_verdict_has_its_own_word_and_shape(shifted):
    assert len({shape for _, shape in VERDICTS.values()}) == len(VERDICTS)
    assert len({word for word, _ in VERDICTS.values()}) == len(VERDICTS)
    work, _, _ = shifted
    tree, _ = parse((work / "check.html").read_text(encoding="utf-8"))
    badges = [s for s in every(tree, "span") if (s.get("class") or "").startswith("badge v-")]
    assert badges
    for badge in badges:
        verdict = badge.get("class").split("v-")[1]
        assert every(badge, "path")[0].get("d") == SHAPES[VERDICTS[verdict][1]]
        assert texts(badge)


def test_an_origin_on_a_hand_off_marks_the_arrow(write):
    from stagewatch.data.check import CheckResult, CheckRow
    from stagewatch.data.html_report import render_check

    plan = compose(load_pipeline(str(write("p.yaml", SMALL))))
    row = CheckRow(id="scorer.input.amount_drift", stage="scorer", layer="input", statistic="psi", window="1h",
                   verdict="critical", value=0.4, warn=0.1, critical=0.25, n=500, m=10000,
                   detail={"reference_counts": [50, 50], "window_counts": [90, 10], "edges": [50.0]})
    attribution = [{"origin": "feed -> scorer", "stage": "scorer", "where": "hand-off", "explanation": "x",
                    "checks": [row.id], "consequences": []}]
    result = CheckResult(at=T0, rows=[row], service_checks=0, stages_without_data=[], attribution=attribution,
                         pipeline="tiny", plan=plan)
    text = render_check(result)
    tree, _ = parse(text)
    arrows = {(g.get("data-from"), g.get("data-to")): g.get("class") for g in every(tree, "g") if g.get("data-from")}
    assert arrows == {("feed", "scorer"): "edge edge-origin"}
    [section] = [s for s in every(tree, "section") if s.get("data-check") == row.id]
    titles = [t.text for t in every(section, "title")]
    assert "bin 1: 90% of the window" in titles and "bin 2: 50% of the reference" in titles


def test_each_verdict_carries_its_severity_and_the_summary_counts_pages_and_tickets(write):
    """Critical is a verdict, paging is a severity: every output names both (parsed by html5lib, markdown-it-py
    and rich's own table)."""
    import io

    from markdown_it import MarkdownIt
    from rich.console import Console

    from stagewatch.data.check import CheckResult, CheckRow
    from stagewatch.data.html_report import render_check
    from stagewatch.data.report import print_table, summary_line, to_markdown

    plan = compose(load_pipeline(str(write("p.yaml", SMALL))))

    def row(name: str, verdict: str, severity: str) -> CheckRow:
        return CheckRow(id=f"scorer.input.{name}", stage="scorer", layer="input", statistic="proportion",
                        window="1h", verdict=verdict, value=0.3, warn=0.1, critical=0.2, n=500, m=10000,
                        severity=severity)

    rows = [row("a", "critical", "ticket"), row("b", "critical", "page"), row("c", "critical", "ticket"),
            row("d", "ok", "page")]
    result = CheckResult(at=T0, rows=rows, service_checks=0, stages_without_data=[], attribution=[],
                         pipeline="tiny", plan=plan)
    assert summary_line(result).endswith("1 ok, 3 critical (1 would page, 2 would open a ticket)")
    expected = {r.id.rsplit(".", 1)[1]: (r.verdict, r.severity) for r in rows}

    md = MarkdownIt("commonmark").enable("table").parse(to_markdown(result))
    cells = [t.content for t in md if t.type == "inline"]
    header = cells.index("check")
    columns = cells[header:header + 8]
    assert columns[:3] == ["check", "verdict", "severity"]
    body = [cells[i:i + 8] for i in range(header + 8, header + 8 * (len(rows) + 1), 8)]
    assert {c[0].rsplit(".", 1)[1]: (c[1].split()[-1], c[2]) for c in body} == expected

    tree, _ = parse(render_check(result))
    [table] = every(tree, "table")
    heads = [texts(th) for th in every(table, "th")]
    assert heads[1:3] == ["Verdict", "Severity"]
    got = {}
    for tr in every(table, "tr")[1:]:
        tds = every(tr, "td")
        got[texts(tds[0]).rsplit(".", 1)[1]] = (texts(tds[1]).split()[-1], texts(tds[2]))
    assert got == expected
    for section in every(tree, "section"):
        check = section.get("data-check").rsplit(".", 1)[1]
        assert expected[check][1] in texts(every(section, "h3")[0])

    out = io.StringIO()
    print_table(result, Console(file=out, width=160, highlight=False))
    lines = out.getvalue().splitlines()
    for name, (verdict, severity) in expected.items():
        [line] = [x for x in lines if x.strip().startswith(f"input.{name} ")]
        mark = ["ok"] if verdict == "ok" else ["x", verdict]
        assert line.split()[1:2 + len(mark)] == [*mark, severity], line

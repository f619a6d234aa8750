"""What the report's words and colours say agrees with what the run did.

Checked against: the verdict rule (triage.run.verdicts.decide on planted scores; the rule is
written in the README's verdict table), histogram counts worked out by hand, and the page's own
headings and style sheet.
"""

from __future__ import annotations

import re
from html import unescape

import pytest
from test_report import make_run

from triage.report import charts
from triage.run.verdicts import decide
from triage.scoring.scorer import TargetScore


@pytest.fixture(scope="module")
def page(tmp_path_factory) -> str:
    run = make_run(tmp_path_factory.mktemp("wording") / "run", n=30, seed=5)
    return (run / "report.html").read_text(encoding="utf-8")


def _visible(html: str) -> str:
    """The text a reader sees: no style sheet, no script, no tags."""
    html = re.sub(r"<(style|script)\b.*?</\1>", " ", html, flags=re.S)
    return unescape(re.sub(r"<[^>]+>", " ", html))


def _score(score: float, rule: str | None = None) -> TargetScore:
    """A one-token target whose objective score is `score` (a length of 1 divides by 1)."""
    return TargetScore(ids=[5], logprobs=[score], logprob_sum=score, length=1, score=score, blocked_rule=rule)


def _rects(svg: str) -> list[tuple[float, str, str]]:
    """(x, fill, tooltip) of every bar segment (rects with a tooltip)."""
    return [(float(x), fill, unescape(tip)) for x, fill, tip in
            re.findall(r'<rect x="([\d.]+)" y="[\d.]+" width="[\d.]+" height="[\d.]+" fill="(#\w+)"><title>([^<]*)</title>',
                       svg)]


def test_histogram_colours_follow_the_verdicts_not_the_side_of_zero():
    # a tie 0.00005 below 0 sits in the bar left of 0 and is drawn as a tie (the rule: |gap| <= margin)
    margin = 1e-4
    gaps = [-0.00005, -1.2, -0.4, 0.00003, 0.8]
    verdicts = [decide([_score(g - 2.0)], _score(-2.0), margin).verdict for g in gaps]
    assert verdicts == ["tie", "model", "model", "tie", "search"]  # the rule, as the README states it
    svg = str(charts.gap_histogram(gaps, verdicts, margin))
    rects = _rects(svg)
    zero_x = float(re.search(r'<line x1="([\d.]+)" y1="[\d.]+" x2="[\d.]+" y2="[\d.]+" class="zero"', svg).group(1))
    by_fill: dict[str, int] = {}
    for _, fill, tip in rects:
        by_fill[fill] = by_fill.get(fill, 0) + int(re.search(r": (\d+) ", tip).group(1))
    # counted by hand: 2 ties, 2 model-side, 1 search-side
    assert by_fill == {charts.COLOURS["tie"]: 2, charts.COLOURS["model"]: 2, charts.COLOURS["search"]: 1}
    tie_left = [x for x, fill, _ in rects if fill == charts.COLOURS["tie"] and x < zero_x]
    assert len(tie_left) == 1  # the slightly negative tie, left of 0, in the tie colour
    # the legend names the three colours, each beside its own swatch
    legend = re.findall(r'<rect x="\d+" y="\d+" width="12" height="11" fill="(#\w+)"/><text [^>]*>([^<]*)</text>', svg)
    assert [(f, t.split(":")[0]) for f, t in legend] == [
        (charts.COLOURS["model"], "model-side"), (charts.COLOURS["tie"], "tie"), (charts.COLOURS["search"], "search-side")]
    assert "within the tie margin (0.0001) of 0" in unescape(svg)
    assert "0 and above" not in svg


def test_navigation_labels_are_the_section_headings(page):
    nav = re.search(r'<nav aria-label="sections">(.*?)</nav>', page, flags=re.S).group(1)
    links = re.findall(r'<a href="#([\w-]+)">([^<]*)</a>', nav)
    assert len(links) >= 6
    for target, label in links:
        heading = re.search(rf'<section id="{target}"[^>]*>\s*<h2>(.*?)</h2>', page, flags=re.S).group(1)
        assert unescape(re.sub(r"<[^>]+>.*", "", heading)).strip() == label


def test_the_score_difference_is_the_score_gap_and_margin_is_the_tolerance(page):
    text = _visible(page)
    assert "Score gap" in text and "score gap, lowest first" in text
    # "margin" is only ever the tolerance: "tie margin" in words, or the run signature's margin=<--margin>
    for m in re.finditer(r"\bmargin\b", text, flags=re.I):
        tie = text[max(0, m.start() - 4):m.start()].lower() == "tie "
        assert tie or text[m.end():m.end() + 1] == "=", text[m.start() - 60:m.end() + 20]


def test_verdict_meanings_match_what_decide_does(page):
    # an output that breaks a rule is skipped, not blocked (triage.run.verdicts.decide)
    assert decide([_score(-1.0)], _score(-2.0, rule="repeated n-gram"), 1e-4).verdict == "skipped"
    rows = dict(re.findall(r'</span>([^<]+)</th><td>([^<]*)</td>', page))
    assert "output" not in rows["blocked by a rule"]
    assert "breaks a decoding rule" in rows["not scored"]
    text = _visible(page)
    assert "Rule applied" not in text and "Why:" in text


def test_settings_say_length_limit_and_minimum_length(page):
    text = _visible(page)
    assert "length limit (new tokens)" in text  # the run's max_new_tokens
    assert not re.search(r"most new tokens|fewest tokens|fewest new tokens", text)


def test_tune_length_penalty_has_a_colour_of_its_own(page):
    css = re.search(r"<style>(.*?)</style>", page, flags=re.S).group(1)
    variables = dict(re.findall(r"--([\w-]+):(#\w+)", css))
    action = re.search(r"\.a-tune-length-penalty\{border-left-color:var\(--([\w-]+)\)\}", css).group(1)
    others = {re.search(rf"\.a-{a}\{{border-left-color:var\(--([\w-]+)\)\}}", css).group(1)
              for a in ("widen-beam", "fix-model")}
    colour = variables[action].lower()
    assert colour not in {c.lower() for c in charts.COLOURS.values()}  # no verdict's colour
    assert colour not in {variables[o].lower() for o in others}

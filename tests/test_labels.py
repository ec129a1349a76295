"""One verdict vocabulary for maps, report and pre-screen (landcheck.verdicts.labels).

Source: common practice (one legend everywhere; a map must still read in greyscale, so no two verdicts
share both line width and dash pattern).
"""

from __future__ import annotations

from landcheck.evidence import maps, prescreen, report
from landcheck.verdicts.evaluate import Verdict
from landcheck.verdicts.labels import VERDICT_COLOURS, VERDICT_LABELS, VERDICT_LINES, VERDICTS, verdict_badge_css


def test_every_verdict_has_one_label_colour_and_line():
    assert sorted(VERDICTS) == sorted(Verdict.ALL)
    for table in (VERDICT_LABELS, VERDICT_COLOURS, VERDICT_LINES):
        assert list(table) == list(VERDICTS)
    assert len(set(VERDICT_LINES.values())) == len(VERDICTS)  # tells verdicts apart without colour


def test_maps_report_and_prescreen_use_the_vocabulary():
    assert {v: style[0] for v, style in maps._VERDICT_STYLE.items()} == VERDICT_COLOURS
    assert maps._VERDICT_TEXT == VERDICT_LABELS
    css = verdict_badge_css()
    assert css in report._CSS and css in prescreen._CSS
    # one review colour on maps and badges
    assert f"border-color:{VERDICT_COLOURS['review']}" in css
    assert report._CSS.count(".v-review{") == prescreen._CSS.count(".v-review{") == 1


def test_interactive_map_uses_the_vocabulary():
    from landcheck.evidence import style, webmap

    assert style.VERDICT_TEXT is VERDICT_LABELS
    assert {v: s[0] for v, s in webmap._WEB_VERDICT_STYLE.items()} == VERDICT_COLOURS
    assert {v: s[1] for v, s in webmap._WEB_VERDICT_STYLE.items()} == {v: w for v, (w, _) in VERDICT_LINES.items()}
    # solid on paper is solid on screen, dashed is dashed
    assert [s[2] is None for s in webmap._WEB_VERDICT_STYLE.values()] == [
        d == "solid" for _, d in VERDICT_LINES.values()
    ]

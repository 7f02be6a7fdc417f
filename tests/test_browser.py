"""Every kind of report (analyze, compare, recommend) opened in real headless Chromium: it
loads without console errors, fetches nothing, every image shows, the verdict sentence is the
first thing read after the title, and a hostile design name stays text.

Skipped, with the reason printed, when Chromium or the playwright package is missing (see
tests/browser.py).  Screenshots go to pytest's tmp_path.
"""

import json

import matplotlib.image
import pytest

import browser
from isoscope import cli
from isoscope.report import compare_verdict, recommend_verdict, verdict_sentence

HOSTILE = "<script>alert(1)</script> \"double\" 'single' & <img src=x onerror=alert(2)>"

SMALL = """name = NAME
description = "Check of the report page: a short tanh stack & nothing else <b>"
[network]
width = 32
depth = 8
activation = "tanh"
[init]
weights = "WEIGHTS"
sigma_w = 1.05
sigma_b = 0.02
[analysis]
inputs = 2
seed = 4
"""


@pytest.fixture(autouse=True)
def _needs_browser():
    reason = browser.missing()
    if reason:
        pytest.skip(f"browser check skipped: {reason}")


def _lines(text: str) -> list[str]:
    return [ln.strip() for ln in text.splitlines() if ln.strip()]


def _write(tmp_path, name, weights="orthogonal"):
    path = tmp_path / f"{weights}.toml"
    # a JSON string is a TOML basic string here
    path.write_text(SMALL.replace("NAME", json.dumps(name)).replace("WEIGHTS", weights))
    return path


def _check(folder, shot):
    check = browser.inspect_page(folder / "report.html", shot)
    assert check.console_errors == [], check.console_errors
    assert check.broken_images == [], check.broken_images
    assert check.dialogs == [] and check.script_count == 0
    assert check.requests == [], f"the page fetched {check.requests}"
    assert check.image_count > 0
    height, width = matplotlib.image.imread(shot).shape[:2]  # the screenshot is a real PNG
    assert width == browser.VIEWPORT["width"] and height > browser.VIEWPORT["height"]
    lines = _lines(check.text)
    assert lines[0] == check.title
    return check, lines


def test_analysis_report_in_chromium(tmp_path):
    out = tmp_path / "report"
    assert cli.main(["analyze", str(_write(tmp_path, HOSTILE)), "--out", str(out)]) == 0
    check, lines = _check(out, tmp_path / "analysis.png")
    result = json.loads((out / "result.json").read_text())
    assert result["name"] == HOSTILE and check.title == f"isoscope: {HOSTILE}"
    assert lines[1] == verdict_sentence(result)  # the verdict first
    assert check.image_count == len(list(out.glob("*.png")))  # every figure written is shown
    # the name shows as its characters wherever it appears, the spec's TOML included
    assert check.text.count(HOSTILE) >= 3 and json.dumps(HOSTILE) in check.text
    text = check.text
    for later in ("spec (resolved", "software and settings", "jaxlib", "scipy", "seed"):
        assert later in text
    assert (
        text.index("measured and predicted spectrum")
        < text.index("spec (resolved")
        < text.index("software and settings")
    )


def test_comparison_report_in_chromium(tmp_path):
    a, b = _write(tmp_path, HOSTILE), _write(tmp_path, "plain gaussian", "gaussian")
    out = tmp_path / "cmp"
    assert cli.main(["compare", str(a), str(b), "--out", str(out)]) == 0
    check, lines = _check(out, tmp_path / "compare.png")
    data = json.loads((out / "comparison.json").read_text())
    assert lines[1] == compare_verdict(data)
    assert check.image_count == len(list(out.rglob("*.png")))
    for d in data["designs"]:
        assert verdict_sentence(d["result"]) in lines


def test_demo_report_in_chromium(tmp_path):
    out = tmp_path / "demo"
    assert cli.main(["demo", "--out", str(out)]) == 0
    check, lines = _check(out, tmp_path / "demo.png")
    assert check.title == cli.DEMO_TITLE
    assert lines[1] == compare_verdict(json.loads((out / "comparison.json").read_text()))


def test_recommendation_report_in_chromium(tmp_path):
    out = tmp_path / "rec"
    assert (
        cli.main(
            [
                "recommend",
                "--activation",
                "tanh",
                "--depth",
                "16",
                "--width",
                "32",
                "--out",
                str(out),
            ]
        )
        == 0
    )
    check, lines = _check(out, tmp_path / "recommend.png")
    data = json.loads((out / "recommendation.json").read_text())
    assert lines[1] == recommend_verdict(data)
    assert lines[2] == data["advice"]  # the limits of the advice come next
    assert "initialization only" in lines[2]

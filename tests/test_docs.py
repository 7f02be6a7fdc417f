"""The user docs stand alone and cover what the code accepts and writes."""

import dataclasses
import re
from pathlib import Path

from isoscope import report
from isoscope.activations import activation_names
from isoscope.analysis import analyze
from isoscope.spec import AnalysisSpec, InitSpec, NetworkSpec, parse_spec

ROOT = Path(__file__).resolve().parents[1]
DOCS = sorted((ROOT / "docs").glob("*.md"))
USER_TEXTS = DOCS + [ROOT / "README.md", ROOT / "DEVELOPERS.md", ROOT / "examples" / "README.md"]


def test_docs_cite_no_file_outside_the_project():
    for path in USER_TEXTS:
        text = path.read_text()
        for ref in re.findall(r"`((?:docs|examples|src|tests|benchmarks)/[\w./-]+)`", text):
            if "*" not in ref:
                assert (ROOT / ref).exists(), f"{path.name} points at {ref}, which does not exist"
        assert "THEORY.md" not in text, f"{path.name} cites a file that is not in the project"


def test_every_spec_key_and_activation_is_documented():
    spec_md = (ROOT / "docs" / "spec.md").read_text()
    for cls in (NetworkSpec, InitSpec, AnalysisSpec):
        for f in dataclasses.fields(cls):
            assert re.search(rf"^{f.name} = ", spec_md, re.M), (
                f"key {f.name} missing in docs/spec.md"
            )
    table = [ln for ln in spec_md.splitlines() if ln.startswith("| `")]
    for name in activation_names():
        assert any(ln.startswith(f"| `{name}`") for ln in table), f"activation {name} has no row"


def test_every_top_level_result_key_is_documented():
    a = analyze(parse_spec({"network": {"width": 4, "depth": 2}, "analysis": {"inputs": 1}}))
    score_md = (ROOT / "docs" / "score.md").read_text()
    for key in report.result_dict(a):
        assert f"`{key}`" in score_md, f"result.json key {key} is not in docs/score.md"

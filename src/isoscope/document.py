"""Self-contained HTML documents: every report kind is built from these few blocks.

A :class:`Document` opens with its title and one verdict sentence, then takes blocks in the
order they are added: headings, paragraphs, figures (PNG embedded as data URIs), tables,
warnings, code (a spec as TOML) and facts (versions, seed).  The page needs nothing from the
network (no scripts, fonts or style sheets from elsewhere), prints cleanly, and escapes every
string it is given, so a design named ``<script>...`` shows as text.
"""

from __future__ import annotations

import base64
import html
import math
from collections.abc import Iterable, Mapping, Sequence
from pathlib import Path
from typing import Any

__all__ = ["Document", "cell"]

_CSS = """
:root{--ink:#1f2a2e;--muted:#5b6b70;--rule:#cdd6d8;--accent:#2f6f73;--warn:#b4491f;--wash:#f3f6f6}
*{box-sizing:border-box}
body{font-family:system-ui,-apple-system,"Segoe UI",sans-serif;color:var(--ink);max-width:68rem;
margin:1.5rem auto;padding:0 1.2rem;line-height:1.45}
h1{font-size:1.55rem;margin:.2rem 0 .6rem}
h2{font-size:1.15rem;margin:2rem 0 .6rem;padding-top:.6rem;border-top:3px solid var(--accent)}
h3{font-size:1rem;margin:1.2rem 0 .4rem}
.verdict{font-size:1.12rem;background:var(--wash);border-left:6px solid var(--accent);
padding:.7rem 1rem;margin:.4rem 0 1.2rem}
figure{margin:1rem 0}figure img{max-width:100%;height:auto;border:1px solid var(--rule)}
figcaption{color:var(--muted);font-size:.88rem;margin-top:.25rem}
table{border-collapse:collapse;margin:.6rem 0 1rem;font-size:.9rem}
th,td{padding:.28rem .65rem;border-bottom:1px solid var(--rule);text-align:right;vertical-align:top}
th{background:var(--wash)}th:first-child,td:first-child,td.t{text-align:left}
caption{caption-side:top;text-align:left;color:var(--muted);font-size:.88rem;padding-bottom:.25rem}
.warn{border-left:5px solid var(--warn);background:#fbf1ec;padding:.45rem .9rem;margin:.4rem 0}
pre{background:var(--wash);padding:.7rem 1rem;overflow-x:auto;font-size:.85rem;border:1px solid var(--rule)}
dl{display:grid;grid-template-columns:max-content 1fr;gap:.15rem 1.2rem;font-size:.9rem}
dt{color:var(--muted)}dd{margin:0}
.small{color:var(--muted);font-size:.88rem}
@media print{body{max-width:none;margin:0}h2{break-before:auto}figure,table,pre{break-inside:avoid}}
"""


def cell(v: Any) -> str:
    """A value as table text, escaped: floats to 4 significant digits, None/NaN/inf as an em
    dash (JSON null), booleans as yes/no, everything else by ``str``."""
    if v is None:
        return "\u2014"
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, float):
        return f"{v:.4g}" if math.isfinite(v) else "\u2014"
    return html.escape(str(v), quote=True)


def _align(v: Any) -> str:
    """Text cells align left, numbers (and null) right."""
    return "" if v is None or isinstance(v, (int, float)) else " class='t'"


def _e(text: Any) -> str:
    return html.escape(str(text), quote=True)


class Document:
    """An HTML report under construction (see the module docstring).

    Args:
      title: the page title (also the ``<title>``).
      verdict: one sentence, shown first under the title.
    """

    def __init__(self, title: str, verdict: str):
        self.title, self.verdict = title, verdict
        self._parts: list[str] = []

    def heading(self, text: str, level: int = 2) -> Document:
        """A section heading (``level`` 2 or 3)."""
        level = 3 if level >= 3 else 2
        self._parts.append(f"<h{level}>{_e(text)}</h{level}>")
        return self

    def paragraph(self, text: str, small: bool = False) -> Document:
        """A paragraph of plain text (escaped)."""
        cls = " class='small'" if small else ""
        self._parts.append(f"<p{cls}>{_e(text)}</p>")
        return self

    def figure(self, png: Path, caption: str) -> Document:
        """A PNG embedded as a data URI, with ``caption`` as its caption and alt text."""
        data = base64.b64encode(Path(png).read_bytes()).decode("ascii")
        self._parts.append(
            f'<figure><img alt="{_e(caption)}" src="data:image/png;base64,{data}">'
            f"<figcaption>{_e(caption)}</figcaption></figure>"
        )
        return self

    def table(
        self, header: Sequence[str], rows: Iterable[Sequence[Any]], caption: str | None = None
    ) -> Document:
        """A table; each value through :func:`cell`."""
        cap = f"<caption>{_e(caption)}</caption>" if caption else ""
        head = "".join(f"<th>{_e(h)}</th>" for h in header)
        body = "".join(
            "<tr>" + "".join(f"<td{_align(v)}>{cell(v)}</td>" for v in row) + "</tr>"
            for row in rows
        )
        self._parts.append(
            f"<table>{cap}<thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"
        )
        return self

    def warnings(self, items: Iterable[str]) -> Document:
        """Each warning in a highlighted box (nothing when there are none)."""
        self._parts += [f"<p class='warn'>{_e(w)}</p>" for w in items]
        return self

    def code(self, title: str, text: str) -> Document:
        """A titled block of preformatted text (a spec as TOML)."""
        self._parts.append(f"<h3>{_e(title)}</h3><pre>{_e(text)}</pre>")
        return self

    def facts(self, title: str, mapping: Mapping[str, Any]) -> Document:
        """A titled list of name/value pairs (software versions, seed, dtype)."""
        items = "".join(f"<dt>{_e(k)}</dt><dd>{cell(v)}</dd>" for k, v in mapping.items())
        self._parts.append(f"<h3>{_e(title)}</h3><dl>{items}</dl>")
        return self

    def render(self) -> str:
        """The whole page: HTML5, UTF-8, styles inline, no external assets."""
        return (
            "<!doctype html>\n<html lang='en'><head><meta charset='utf-8'>"
            "<meta name='viewport' content='width=device-width, initial-scale=1'>"
            f"<title>{_e(self.title)}</title><style>{_CSS}</style></head><body>"
            f"<h1>{_e(self.title)}</h1><p class='verdict'>{_e(self.verdict)}</p>"
            + "".join(self._parts)
            + "</body></html>\n"
        )

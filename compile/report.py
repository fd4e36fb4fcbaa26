"""HTML pages and matplotlib figures shared by `ganlet verify` and `ganlet evaluate`.

One self-contained HTML file per report: figures are PNGs embedded as base64, so the file can
be mailed or attached to a CI run as it stands. Plain tables in the terminal, the same rows in
the page.
"""

from __future__ import annotations

import base64
import html
import io
from typing import Optional, Sequence

import numpy as np

# One colour per series name, stable across the figures of one report.
COLOURS = {"device": "black", "onnxruntime": "tab:orange", "numpy": "tab:green",
           "fp32 student": "tab:purple", "teacher": "tab:blue", "bundle": "black",
           "IsolationForest": "tab:red", "GaussianMixture": "tab:brown",
           "OneClassSVM": "tab:pink", "rolling z-score": "tab:olive"}


def pyplot():
    """matplotlib with the file-only backend (no display on a build server)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def colour(name: str, k: int = 0) -> str:
    return COLOURS.get(name, f"C{k % 10}")


def figure_png(fig) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=100)
    pyplot().close(fig)
    return buf.getvalue()


def fmt(value, digits: int = 4) -> str:
    if value is None:
        return "-"
    if isinstance(value, (bool, np.bool_)):
        return "yes" if value else "no"
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    if isinstance(value, (float, np.floating)):
        v = float(value)
        if not np.isfinite(v):
            return "nan" if np.isnan(v) else ("inf" if v > 0 else "-inf")
        return f"{v:.{digits}g}"
    return str(value)


def text_table(headers: Sequence[str], rows: Sequence[Sequence]) -> str:
    """A fixed-width table for the terminal."""
    cells = [[str(h) for h in headers]] + [[fmt(v) for v in row] for row in rows]
    widths = [max(len(r[j]) for r in cells) for j in range(len(headers))]
    lines = ["  ".join(c.ljust(w) if j == 0 else c.rjust(w)
                       for j, (c, w) in enumerate(zip(row, widths))) for row in cells]
    lines.insert(1, "  ".join("-" * w for w in widths))
    return "\n".join(lines)


def html_table(headers: Sequence[str], rows: Sequence[Sequence], classes: Optional[list] = None) -> str:
    head = "".join(f"<th>{html.escape(str(h))}</th>" for h in headers)
    body = []
    for k, row in enumerate(rows):
        cls = f' class="{classes[k]}"' if classes and classes[k] else ""
        body.append(f"<tr{cls}>" + "".join(f"<td>{html.escape(fmt(v))}</td>" for v in row)
                    + "</tr>")
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>"


def html_image(png: bytes, alt: str) -> str:
    data = base64.b64encode(png).decode("ascii")
    return f'<figure><img alt="{html.escape(alt)}" src="data:image/png;base64,{data}"></figure>'


def html_page(title: str, sections: Sequence[tuple]) -> str:
    """sections: (heading, html body) pairs."""
    parts = [f"<h2>{html.escape(h)}</h2>\n{body}" for h, body in sections]
    return f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>{html.escape(title)}</title>
<style>
body {{ font-family: sans-serif; margin: 2em; max-width: 1200px; color: #222; }}
table {{ border-collapse: collapse; margin: 0.5em 0 1em; font-size: 0.9em; }}
th, td {{ border: 1px solid #bbb; padding: 0.25em 0.6em; text-align: right; }}
th:first-child, td:first-child {{ text-align: left; }}
tr.fail td {{ background: #fbe3e3; }} tr.pass td {{ background: #e6f4e6; }}
img {{ max-width: 100%; }} .note {{ color: #555; }}
</style></head><body>
<h1>{html.escape(title)}</h1>
{''.join(parts)}
<p class="note">Detection is advisory condition monitoring; it is not a safety function and
does not replace trips, interlocks or protection devices.</p>
</body></html>
"""


def paragraph(text: str, cls: str = "") -> str:
    c = f' class="{cls}"' if cls else ""
    return f"<p{c}>{html.escape(text)}</p>"


def shade_runs(ax, times, mask, colour_name: str, alpha: float, label: Optional[str] = None):
    """Shade the time spans where mask is true (one legend entry)."""
    mask = np.asarray(mask, bool)
    padded = np.concatenate([[False], mask, [False]]).astype(np.int8)
    edges = np.flatnonzero(np.diff(padded))
    for k, (b, e) in enumerate(zip(edges[0::2], edges[1::2])):
        ax.axvspan(times[b], times[e - 1], color=colour_name, alpha=alpha,
                   label=label if k == 0 else None, lw=0)


def positive_log_axis(ax, arrays) -> None:
    """Log scale when every finite value is positive and they span more than a decade."""
    vals = np.concatenate([np.asarray(a, float).ravel() for a in arrays])
    vals = vals[np.isfinite(vals)]
    if len(vals) and vals.min() > 0 and vals.max() / vals.min() > 10:
        ax.set_yscale("log")

"""HTML pages and matplotlib figures shared by `ganlet verify` and `ganlet evaluate`.

One self-contained HTML file per report: figures are PNGs embedded as base64, so the file can
be mailed or attached to a CI run as it stands. Plain tables in the terminal, the same rows in
the page. Every report says what it tested (provenance(): the bundle and its manifest hash, the
data file's hash and span, the tool, the gateway interpreter that produced a device capture, the
date); times are UTC throughout.
"""

from __future__ import annotations

import base64
import html
import io
import platform
from datetime import datetime, timezone
from pathlib import Path
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


def time_axis(ax) -> None:
    """Dates on the x axis, compact, labelled with the zone every report time is in."""
    import matplotlib.dates as mdates

    locator = mdates.AutoDateLocator()
    ax.xaxis.set_major_locator(locator)
    ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator))
    ax.set_xlabel("time (UTC)")


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


def duration(seconds) -> str:
    """A delay a person reads at a glance: seconds below 2 min, minutes below 2 h, then hours,
    then days; '-' when there is none (NaN)."""
    if seconds is None or not np.isfinite(seconds):
        return "-"
    s = float(seconds)
    for limit, unit, size in ((120, "s", 1), (7200, "min", 60), (172800, "h", 3600)):
        if abs(s) < limit:
            return f"{s / size:.3g} {unit}"
    return f"{s / 86400:.3g} d"


def text_table(headers: Sequence[str], rows: Sequence[Sequence]) -> str:
    """A fixed-width table for the terminal."""
    cells = [[str(h) for h in headers]] + [[fmt(v) for v in row] for row in rows]
    widths = [max(len(r[j]) for r in cells) for j in range(len(headers))]
    lines = ["  ".join(c.ljust(w) if j == 0 else c.rjust(w)
                       for j, (c, w) in enumerate(zip(row, widths))) for row in cells]
    lines.insert(1, "  ".join("-" * w for w in widths))
    return "\n".join(lines)


def definitions(items: Sequence[tuple]) -> str:
    """(term, meaning) pairs as a definition list (a report's glossary)."""
    body = "".join(f"<dt>{html.escape(t)}</dt><dd>{html.escape(m)}</dd>" for t, m in items)
    return f'<dl class="glossary">{body}</dl>'


def html_table(headers: Sequence[str], rows: Sequence[Sequence], classes: Optional[list] = None) -> str:
    head = "".join(f"<th>{html.escape(str(h))}</th>" for h in headers)
    body = []
    for k, row in enumerate(rows):
        cls = f' class="{classes[k]}"' if classes and classes[k] else ""
        body.append(f"<tr{cls}>" + "".join(html_cell(v) for v in row) + "</tr>")
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>"


class Html(str):
    """Cell content that is already HTML (built from escaped parts): placed as it is."""


def lines_html(lines: Sequence[str]) -> Html:
    """Several items of text in one cell, as a bulleted list ('-' when there are none)."""
    if not lines:
        return Html("-")
    return Html('<ul class="cell">' + "".join(f"<li>{html.escape(x)}</li>" for x in lines)
                + "</ul>")


def html_cell(value) -> str:
    """A table cell; numbers right-aligned (class num) so their digits line up, text left."""
    if isinstance(value, Html):
        return f"<td>{value}</td>"
    number = (isinstance(value, (int, float, np.integer, np.floating))
              and not isinstance(value, (bool, np.bool_)))
    text = fmt(value)
    classes = " ".join(c for c, on in (("num", number), ("short", len(text) <= 24)) if on)
    return f'<td class="{classes}">{html.escape(text)}</td>' if classes else \
        f"<td>{html.escape(text)}</td>"


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
th, td {{ border: 1px solid #bbb; padding: 0.25em 0.6em; text-align: left; vertical-align: top; }}
th {{ background: #f2f2f2; }} td.num {{ text-align: right; font-variant-numeric: tabular-nums; }}
td:first-child, td.short {{ white-space: nowrap; }} ul.cell {{ margin: 0; padding-left: 1.1em; }} tr.group td {{ border-top: 2px solid #777; }}
tr.fail td {{ background: #fbe3e3; }} tr.pass td {{ background: #e6f4e6; }}
img {{ max-width: 100%; }} .note {{ color: #555; }}
table.facts td:last-child {{ font-family: monospace; overflow-wrap: anywhere; }}
dl.glossary {{ display: grid; grid-template-columns: max-content auto; gap: 0.15em 1em; font-size: 0.9em; }}
dl.glossary dt {{ font-weight: bold; }} dl.glossary dd {{ margin: 0; }}
.verdict-pass {{ color: #1a6b1a; font-weight: bold; }} .verdict-fail {{ color: #a31515; font-weight: bold; }}
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


# ---------------------------------------------------------------------------------------------
# provenance: what a report tested


def now_utc() -> str:
    return datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


def workstation() -> dict:
    """The tool and the interpreter writing the report."""
    from ganlet.compile import __version__

    return {"tool_version": __version__, "python": platform.python_version(),
            "numpy": np.__version__, "machine": platform.machine(),
            "platform": platform.platform(), "host": platform.node(), "created": now_utc()}


def bundle_facts(bundle) -> dict:
    """Which bundle: its id (the SHA-256 of manifest.json's bytes as loaded) and the SHA-256
    of manifest.json as it is on disk now, read again here."""
    from ganlet.runtime.manifest import MANIFEST_NAME, file_sha256

    m = bundle.manifest
    return {"name": m["name"], "bundle_id": bundle.bundle_id,
            "manifest_sha256": file_sha256(Path(bundle.dir) / MANIFEST_NAME),
            "created": m["created"], "tool_version": m["tool_version"],
            "board": m.get("board", {}).get("name"), "signed": bool(bundle.signed),
            "window": bundle.window, "hop": bundle.hop, "period_s": bundle.period_s,
            "threshold": bundle.threshold_policy.get("kind"),
            **score_unit(m.get("score", {}))}


def score_unit(section: dict) -> dict:
    """What a bundle's score counts, long (for the facts) and short (for plot axes)."""
    if section.get("regimes") is not None:
        return {"score_unit": f"multiples of each channel's normal RMS error in its operating "
                              f"regime, combined over channels by {section.get('combine')}",
                "score_unit_short": "× normal error"}
    return {"score_unit": "mean squared reconstruction error of the robust-scaled inputs "
                          "(dimensionless)",
            "score_unit_short": "scaled units²"}


def data_facts(path, time_col: str) -> dict:
    """Which data: the file's SHA-256 and size, its rows and the span of its time column."""
    from ganlet.compile.data import parse_times, read_table
    from ganlet.runtime.manifest import file_sha256

    path = Path(path)
    facts = {"path": str(path), "sha256": file_sha256(path), "bytes": path.stat().st_size}
    table = read_table(path, None)
    if time_col in table.columns:
        times = parse_times(table[time_col]).dropna()
        facts.update(rows=int(len(table)),
                     first=_utc(times.min()) if len(times) else None,
                     last=_utc(times.max()) if len(times) else None)
    return facts


def _utc(stamp) -> str:
    return np.datetime_as_string(np.datetime64(stamp, "s")) + "Z"


def device_facts(capture: dict, source: str) -> dict:
    """Where the device scores came from: the scores file's own provenance lines."""
    facts = {"source": source}
    facts.update({k: capture[k] for k in ("bundle_id", "backend", "python", "numpy", "machine",
                                           "platform", "host", "started") if k in capture})
    if "bundle_id" not in capture:
        facts["note"] = ("the scores file carries no provenance lines (written by an older "
                         "runtime): its origin cannot be confirmed")
    return facts


FACT_LABELS = {
    "bundle": {"name": "name", "bundle_id": "bundle id (SHA-256 of manifest.json as loaded)",
               "manifest_sha256": "manifest.json SHA-256 (read again for this report)",
               "created": "packed (UTC)", "tool_version": "packed by ganlet",
               "board": "board profile", "signed": "signed (manifest.hmac)",
               "window": "window (samples)", "hop": "hop (samples)",
               "period_s": "sample period (s)", "threshold": "threshold policy"},
    "model": {"path": "model directory", "model_json_sha256": "model.json SHA-256"},
    "data": {"path": "file", "sha256": "SHA-256", "bytes": "size (bytes)", "rows": "rows",
             "first": "first time (UTC)", "last": "last time (UTC)"},
    "device": {"source": "scores from", "bundle_id": "bundle id in the scores file",
               "backend": "gateway backend", "python": "gateway Python",
               "numpy": "gateway numpy", "machine": "gateway machine",
               "platform": "gateway platform", "host": "gateway host",
               "started": "gateway run started (UTC)", "note": "note"},
    "report": {"created": "report written (UTC)", "tool_version": "ganlet version",
               "python": "workstation Python", "numpy": "workstation numpy",
               "machine": "workstation machine", "platform": "workstation platform",
               "host": "workstation host"},
}


def facts_rows(provenance: dict) -> list:
    """[part, what, value] rows of a provenance dict, in FACT_LABELS order."""
    rows = []
    for part, labels in FACT_LABELS.items():
        facts = provenance.get(part) or {}
        rows += [[part, label, facts[key]] for key, label in labels.items() if key in facts]
    return rows


def facts_table(provenance: dict) -> str:
    """The facts grouped by part: the part named once, a rule above each group."""
    rows, classes, last = [], [], None
    for part, label, value in facts_rows(provenance):
        rows.append([part if part != last else "", label, fmt(value)])
        classes.append("group" if part != last else "")
        last = part
    return html_table(["part", "what", "value"], rows, classes).replace(
        "<table>", '<table class="facts">', 1)


# ---------------------------------------------------------------------------------------------
# alert settings, as a table a person reads

ALERT_SETTING_TEXT = {
    "warmup_hops": "scores at the start that never open an alert (the model's warm-up)",
    "min_hops": "consecutive scores above the threshold needed to open an alert",
    "close_ratio": "an open alert closes when the score falls below this fraction of the "
                   "threshold (hysteresis)",
    "cooldown_hops": "scores after an alert closes during which no new alert opens",
}


POLICY_TEXT = {
    "pot": "peaks-over-threshold: a generalised Pareto tail fitted to the calibration scores "
           "sets the level",
    "rolling": "rolling median of recent scores + k times their median absolute deviation (MAD)",
    "static": "a fixed quantile of the calibration scores",
}


def alert_settings_rows(alerting: dict, step_s: Optional[float] = None) -> list:
    """[setting, value, meaning, as time] rows; `as time` when one step's length is known."""
    rows = []
    order = [k for k in ALERT_SETTING_TEXT if k in alerting]
    for key, value in ((k, alerting[k]) for k in order + sorted(set(alerting) - set(order))):
        as_time = "-"
        if step_s and key.endswith("_hops"):
            as_time = duration(float(value) * step_s)
        rows.append([key, value, ALERT_SETTING_TEXT.get(key, ""), as_time])
    return rows

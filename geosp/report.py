"""
Self-contained HTML interpretation report (``report.html``).

The layout follows a consultant's interpretation memo: title block, summary,
cautions in brief, then the sections the pipeline composes (survey and
reduction QC, grid, detection table, one section per source), the full
cautions and the provenance of the run. Figures are embedded as base64 PNG
and every piece of user text is HTML-escaped, so the file can be mailed and
opened anywhere with no network.
"""

from __future__ import annotations

import base64
import html
import io
import json
import math
import re

import numpy as np
import pandas as pd

from geosp.webmap import CAUTIONS

__all__ = ["make_report", "source_parameter_table", "CAUTIONS"]

_CSS = """
body {font: 14px/1.45 "DejaVu Sans", Arial, sans-serif; color: #222; margin: 0; background: #f4f4f2;}
main {max-width: 1000px; margin: 0 auto; background: #fff; padding: 28px 40px 40px 40px;}
header.title-block {border-bottom: 3px solid #333; margin-bottom: 18px; padding-bottom: 8px;}
header.title-block h1 {margin: 0 0 4px 0; font-size: 24px;}
header.title-block .meta {color: #555; font-size: 12px;}
h2 {border-bottom: 1px solid #bbb; padding-bottom: 3px; margin-top: 30px; font-size: 19px;}
h3 {font-size: 16px; margin-top: 22px;}
table.tbl {border-collapse: collapse; margin: 8px 0 14px 0; font-size: 12.5px;}
table.tbl th, table.tbl td {border: 1px solid #ccc; padding: 3px 7px; text-align: right;}
table.tbl th {background: #eee;}
table.tbl td:first-child, table.tbl th:first-child {text-align: left;}
table.kv th {text-align: left; background: #f2f2f2; width: 34%;}
table.kv td {text-align: left;}
figure {margin: 10px 0 18px 0;}
figure img {max-width: 100%; height: auto; border: 1px solid #ddd;}
figcaption {font-size: 12px; color: #555;}
.caution {background: #fff6e0; border: 1px solid #d9a400; border-left: 6px solid #d9a400;
  padding: 8px 14px; margin: 12px 0;}
.caution ul {margin: 4px 0; padding-left: 20px;}
nav.toc ol {margin: 4px 0; padding-left: 22px;}
pre.prov {background: #f6f6f6; border: 1px solid #ddd; padding: 8px; white-space: pre-wrap;
  font-size: 11.5px;}
.tablecap {font-size: 12px; color: #555; margin-bottom: 2px;}
"""


def _text(value):
    if value is None:
        return ""
    return html.escape(str(value), quote=True)


def _anchor(text, used):
    base = re.sub(r"[^a-z0-9]+", "-", str(text).lower()).strip("-") or "section"
    anchor, k = base, 2
    while anchor in used:
        anchor, k = f"{base}-{k}", k + 1
    used.add(anchor)
    return anchor


def _paragraphs(text):
    if text is None:
        return ""
    if isinstance(text, (list, tuple)):
        chunks = [str(t) for t in text]
    else:
        chunks = re.split(r"\n\s*\n", str(text))
    return "".join(f"<p>{_text(c.strip())}</p>" for c in chunks if c.strip())


def _format_cell(value):
    if value is None:
        return "–"
    if isinstance(value, (float, np.floating)):
        if not math.isfinite(value):
            return "–"
        magnitude = abs(value)
        if magnitude != 0 and (magnitude >= 1e6 or magnitude < 1e-3):
            return f"{value:.3g}"
        return f"{value:.4g}" if magnitude < 100 else f"{value:.1f}"
    if isinstance(value, (bool, np.bool_)):
        return "yes" if value else "no"
    if isinstance(value, (list, tuple)):
        return "; ".join(str(v) for v in value)
    try:
        if pd.isna(value):
            return "–"
    except (TypeError, ValueError):
        pass
    return str(value)


def _table_html(frame, *, caption=""):
    """Render a DataFrame as an HTML table; every header and cell is escaped."""
    frame = pd.DataFrame(frame)
    show_index = not isinstance(frame.index, pd.RangeIndex)
    head = "".join(f"<th>{_text(c)}</th>" for c in ([frame.index.name or ""] if show_index
                                                    else []) + list(frame.columns))
    body = []
    for index, row in zip(frame.index, frame.itertuples(index=False, name=None)):
        cells = [f"<th>{_text(index)}</th>"] if show_index else []
        cells += [f"<td>{_text(_format_cell(v))}</td>" for v in row]
        body.append("<tr>" + "".join(cells) + "</tr>")
    cap = f'<div class="tablecap">{_text(caption)}</div>' if caption else ""
    return (f'{cap}<table class="tbl"><thead><tr>{head}</tr></thead>'
            f"<tbody>{''.join(body)}</tbody></table>")


def _key_value_html(mapping):
    rows = []
    for key, value in mapping.items():
        if isinstance(value, (dict, list, tuple)) and not isinstance(value, str):
            shown = json.dumps(value, indent=1, default=str, ensure_ascii=False)
            cell = f'<pre class="prov">{_text(shown)}</pre>'
        elif isinstance(value, str) and "\n" in value:  # the project file: kept as written
            cell = f'<pre class="prov">{_text(value)}</pre>'
        else:
            cell = _text(_format_cell(value))
        rows.append(f"<tr><th>{_text(key)}</th><td>{cell}</td></tr>")
    return f'<table class="tbl kv"><tbody>{"".join(rows)}</tbody></table>'


def _figure_html(name, figure, *, dpi=110):
    buffer = io.BytesIO()
    # A figure may ask for its own resolution (geosp_dpi), e.g. the many per-source profiles.
    figure.savefig(buffer, format="png", dpi=getattr(figure, "geosp_dpi", dpi), bbox_inches="tight")
    data = base64.b64encode(buffer.getvalue()).decode("ascii")
    return (f'<figure><img alt="{_text(name)}" src="data:image/png;base64,{data}">'
            f"<figcaption>{_text(name)}</figcaption></figure>")


def _cautions_html(cautions, heading=None):
    items = "".join(f"<li>{_text(c)}</li>" for c in cautions)
    title = f"<b>{_text(heading)}</b>" if heading else ""
    return f'<div class="caution" role="note">{title}<ul>{items}</ul></div>'


def make_report(*, title, survey_summary, sections, figures, tables, cautions=CAUTIONS,
                provenance):
    """
    Build the interpretation report as one self-contained HTML document.

    Parameters
    ----------
    title : str
        Report title (escaped).
    survey_summary : dict
        Label to value, shown as the summary table under the title block
        (for example survey name, working CRS, station count, date range).
    sections : list of dict
        In order. Each dict has ``"heading"`` (str), optional ``"text"``
        (str with blank-line paragraph breaks, or a list of paragraphs),
        ``"figures"`` and ``"tables"`` (lists of names into ``figures`` and
        ``tables``, shown in that order) and optional ``"level"`` (2 for a
        main section, default; 3 for a sub-section such as one source).
    figures : dict of str to matplotlib.figure.Figure
        Embedded as PNG; the name is the caption.
    tables : dict of str to pandas.DataFrame
        Rendered with escaped headers and cells; the name is the caption. A
        non-default index is shown as the first column.
    cautions : sequence of str
        Shown in brief after the summary and in full near the end. Default
        :data:`CAUTIONS`.
    provenance : dict
        geosp version, project file, input checksums, timings, warnings...
        (nested values shown as JSON).

    Returns
    -------
    str
        The HTML document.

    Raises
    ------
    ValueError
        If a section names a figure or table that was not given.
    """
    used = set()
    toc, parts = [], []
    for section in sections:
        heading = section.get("heading", "")
        level = 3 if int(section.get("level", 2)) >= 3 else 2
        anchor = _anchor(heading, used)
        if level == 2:
            toc.append(f'<li><a href="#{anchor}">{_text(heading)}</a></li>')
        block = [f'<section id="{anchor}"><h{level}>{_text(heading)}</h{level}>',
                 _paragraphs(section.get("text"))]
        for name in section.get("figures", ()) or ():
            if name not in figures:
                raise ValueError(f"Report section {heading!r} names figure {name!r}, "
                                 "which was not given.")
            block.append(_figure_html(name, figures[name]))
        for name in section.get("tables", ()) or ():
            if name not in tables:
                raise ValueError(f"Report section {heading!r} names table {name!r}, "
                                 "which was not given.")
            block.append(_table_html(tables[name], caption=name))
        block.append("</section>")
        parts.append("".join(block))
    caution_anchor = _anchor("cautions", used)
    prov_anchor = _anchor("provenance", used)
    toc.append(f'<li><a href="#{caution_anchor}">Cautions</a></li>')
    toc.append(f'<li><a href="#{prov_anchor}">Provenance</a></li>')
    version = provenance.get("geosp_version", provenance.get("version", ""))
    created = provenance.get("created", provenance.get("finished", ""))
    meta = " · ".join(_text(v) for v in (
        f"geosp {version}" if version else "", f"created {created}" if created else "") if v)
    return f"""<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>{_text(title)}</title>
<style>{_CSS}</style>
</head>
<body>
<main>
<header class="title-block">
<h1>{_text(title)}</h1>
<div class="meta">Self-potential interpretation memo{' · ' + meta if meta else ''}</div>
</header>
<section id="summary"><h2>Summary</h2>
{_key_value_html(survey_summary)}
{_cautions_html(cautions, "Read before use")}
</section>
<nav class="toc"><b>Contents</b><ol>{''.join(toc)}</ol></nav>
{''.join(parts)}
<section id="{caution_anchor}"><h2>Cautions</h2>
{_cautions_html(cautions)}
<p>Parameter ranges are 16th to 84th percentiles of the stated uncertainty method; they
describe the fit of the chosen model to these data, not the range of all geologically
possible sources.</p>
</section>
<section id="{prov_anchor}"><h2>Provenance</h2>
{_key_value_html(provenance)}
</section>
</main>
</body>
</html>
"""


_PARAMETERS = (
    ("Top depth", "top_depth_m", "top_depth_lo_m", "top_depth_hi_m", "m"),
    ("Bottom depth", "bottom_depth_m", None, None, "m"),
    ("Jump across patch", "jump_mv", "jump_lo_mv", "jump_hi_mv", "mV"),
    ("Strike", "strike_deg", None, None, "°"),
    ("Dip", "dip_deg", None, None, "°"),
    ("Dip direction", "dip_dir_deg", None, None, "°"),
    ("Length along strike", "length_m", None, None, "m"),
    ("Conductivity ratio", "sigma_ratio", None, None, ""),
    ("Negative pole depth", "neg_depth_m", None, None, "m"),
    ("Pole strength", "pole_k_mv_m", None, None, "mV·m"),
    ("Line strength per unit length", "line_k_mv", None, None, "mV"),
    ("RMS misfit", "rms_mv", None, None, "mV"),
    ("Reduced chi-square", "chi2_red", None, None, ""),
    ("BIC gain over no source", "bic_gain", None, None, ""),
)


def source_parameter_table(row):
    """
    Parameter table of one source row for the report.

    Parameters
    ----------
    row : dict
        A ``sources`` row (contract field names).

    Returns
    -------
    pandas.DataFrame
        Columns ``parameter``, ``value``, ``p16``, ``p84``, ``unit``; rows
        only for the fields the row has with a finite value (``p16``/``p84``
        NaN where no range is given).
    """
    def number(key):
        if key is None:
            return np.nan
        try:
            return float(row.get(key, np.nan))
        except (TypeError, ValueError):
            return np.nan

    records = []
    for label, key, lo, hi, unit in _PARAMETERS:
        value = number(key)
        if not math.isfinite(value):
            continue
        records.append({"parameter": label, "value": value, "p16": number(lo),
                        "p84": number(hi), "unit": unit})
    return pd.DataFrame(records, columns=["parameter", "value", "p16", "p84", "unit"])

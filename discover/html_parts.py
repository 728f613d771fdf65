"""Building blocks of the HTML report: escaping, numbers, tables, embedded figures, the style sheet.

Everything that comes from the data goes through :func:`esc` (:func:`html.escape`);
figures are embedded as base64 PNG ``data:`` URIs, so the page loads nothing from
anywhere else.
"""

from __future__ import annotations

import base64
import html
import io

import numpy as np

from .report import _pyplot

FIGURE_DPI = 100

_STYLE = """
body { font-family: system-ui, -apple-system, "Segoe UI", Helvetica, Arial, sans-serif;
       color: #111; background: #fff; max-width: 72rem; margin: 0 auto; padding: 1rem 1.5rem 3rem;
       line-height: 1.45; }
h1 { font-size: 1.6rem; margin-bottom: 0.2rem; }
h2 { font-size: 1.25rem; border-bottom: 1px solid #444; padding-bottom: 0.2rem; margin-top: 2.2rem; }
h3 { font-size: 1.05rem; margin-bottom: 0.3rem; }
nav ol { columns: 2; font-size: 0.95rem; }
.caution { border: 3px double #000; padding: 0.6rem 1rem; background: #f2f2f2; }
.equation { font-family: ui-monospace, "DejaVu Sans Mono", Menlo, Consolas, monospace; font-size: 1.02rem;
            background: #f6f6f6; padding: 0.35rem 0.6rem; border-left: 4px solid #000; overflow-x: auto; }
table { border-collapse: collapse; margin: 0.5rem 0 1rem; font-size: 0.92rem; }
caption { text-align: left; font-weight: 600; padding-bottom: 0.25rem; }
th, td { border: 1px solid #999; padding: 0.2rem 0.55rem; vertical-align: top; }
th { background: #e6e6e6; text-align: left; }
td.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
td.hash, td.path { font-family: ui-monospace, Menlo, Consolas, monospace; font-size: 0.82rem;
                   word-break: break-all; }
pre { background: #f6f6f6; border: 1px solid #ccc; padding: 0.6rem; overflow-x: auto; font-size: 0.85rem; }
figure { margin: 0.8rem 0 1.4rem; }
figure img { max-width: 100%; height: auto; border: 1px solid #ddd; }
figcaption { font-size: 0.9rem; color: #333; }
.absent { font-style: italic; color: #333; }
ul.warnings li { margin-bottom: 0.3rem; }
@media print { nav { display: none; } h2 { break-after: avoid; } figure { break-inside: avoid; } }
"""


def esc(value):
    """Escape any value for HTML text or a quoted attribute."""
    return html.escape(str(value), quote=True)


def _number(value, digits=4):
    """A number for a table cell: ``—`` for None/NaN."""
    if value is None:
        return "—"
    value = float(value)
    return "—" if not np.isfinite(value) else f"{value:.{digits}g}"


def _percent(value, digits=1):
    return "—" if value is None or not np.isfinite(value) else f"{value:.{digits}f} %"


# --------------------------------------------------------------------------- HTML building blocks


def _table(header, rows, *, caption=None, numeric=(), classes=None):
    """An HTML table; every cell is escaped. ``numeric``: column indices right-aligned."""
    classes = classes or {}
    parts = ["<table>"]
    if caption:
        parts.append(f"<caption>{esc(caption)}</caption>")
    parts.append("<thead><tr>" + "".join(f'<th scope="col">{esc(h)}</th>' for h in header) + "</tr></thead>")
    parts.append("<tbody>")
    for row in rows:
        cells = []
        for k, cell in enumerate(row):
            css = "num" if k in numeric else classes.get(k)
            cells.append(f'<td class="{css}">{esc(cell)}</td>' if css else f"<td>{esc(cell)}</td>")
        parts.append("<tr>" + "".join(cells) + "</tr>")
    parts.append("</tbody></table>")
    return "\n".join(parts)


def _paragraph(text, css=None):
    return f'<p class="{css}">{esc(text)}</p>' if css else f"<p>{esc(text)}</p>"


def figure_uri(fig, *, dpi=FIGURE_DPI):
    """A matplotlib figure as a ``data:image/png;base64,...`` URI; the figure is closed."""
    plt = _pyplot()
    buffer = io.BytesIO()
    try:
        fig.savefig(buffer, format="png", dpi=dpi, metadata={"Software": None})
    finally:
        plt.close(fig)
    return "data:image/png;base64," + base64.b64encode(buffer.getvalue()).decode("ascii")


def _figure(make, caption, png=None):
    """``<figure>`` with the embedded PNG ``png`` (bytes of a figure already written), else of ``make()``.

    Math text is off while the figure is built and drawn: names from the data may
    hold ``$``, which matplotlib would otherwise read as TeX.
    """
    import matplotlib

    if png is not None:
        uri = "data:image/png;base64," + base64.b64encode(png).decode("ascii")
    else:
        with matplotlib.rc_context({"text.parse_math": False}):
            uri = figure_uri(make())
    return (f'<figure><img src="{uri}" alt="{esc(caption)}">'
            f"<figcaption>{esc(caption)}</figcaption></figure>")


# --------------------------------------------------------------------------- figures of this module

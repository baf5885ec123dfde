"""Self-contained HTML pages: escaping, tables, embedded images, one inline script.

Every piece of text that comes from a log or the command line goes through :func:`esc`
(``html.escape`` with quotes); markup built here is wrapped in :class:`Html` so it is not
escaped twice.  Pages carry a Content-Security-Policy that allows nothing from the network:
images only as ``data:`` URIs, the inline style sheet, and the one inline script by its
SHA-256 hash, so a browser refuses (and reports) any outside fetch.
"""

from __future__ import annotations

import base64
import hashlib
import html
from collections.abc import Iterable, Sequence
from typing import Any

__all__ = ["Html", "esc", "image", "page", "section", "table"]


class Html(str):
    """A string of markup built here: inserted as is."""


def esc(x: Any) -> Html:
    """Escape any value for HTML text or attribute context."""
    if isinstance(x, Html):
        return x
    return Html(html.escape("" if x is None else str(x), quote=True))


def image(data: bytes, mime: str, alt: str, *, cls: str = "plot") -> Html:
    """An ``<img>`` whose source is embedded as base64."""
    b64 = base64.b64encode(data).decode("ascii")
    return Html(f'<img class="{esc(cls)}" alt="{esc(alt)}" src="data:{esc(mime)};base64,{b64}">')


def table(headers: Sequence[str], rows: Iterable[Sequence[Any]], *, table_id: str | None = None,
          numeric: Sequence[int] = (), filter_label: str | None = None) -> Html:
    """A table; cells are escaped unless :class:`Html`. ``numeric`` columns align right.

    With ``filter_label`` a text box above the table hides rows not containing its text.
    """
    num = set(numeric)
    head = "".join(f'<th{" class=n" if i in num else ""}>{esc(h)}</th>'
                   for i, h in enumerate(headers))
    body = []
    for row in rows:
        cells = "".join(f'<td{" class=n" if i in num else ""}>{esc(c)}</td>'
                        for i, c in enumerate(row))
        body.append(f"<tr>{cells}</tr>")
    tid = f' id="{esc(table_id)}"' if table_id else ""
    box = ""
    if filter_label and table_id:
        box = (f'<p><label>{esc(filter_label)} <input type="search" data-filter="'
               f'{esc(table_id)}"></label></p>')
    return Html(f"{box}<table{tid}><thead><tr>{head}</tr></thead>"
                f"<tbody>{''.join(body)}</tbody></table>")


def section(title: str, *parts: Any, sid: str | None = None) -> Html:
    inner = "\n".join(p if isinstance(p, Html) else f"<p>{esc(p)}</p>" for p in parts)
    sid_attr = f' id="{esc(sid)}"' if sid else ""
    return Html(f"<section{sid_attr}><h2>{esc(title)}</h2>\n{inner}\n</section>")


_CSS = """
body{font:14px/1.45 system-ui,-apple-system,"Segoe UI",sans-serif;margin:0;color:#1d1d1f;
background:#fbfbfa}
header{background:#26323f;color:#f4f4f4;padding:14px 24px}
header h1{margin:0;font-size:20px;font-weight:600}
header p{margin:4px 0 0;color:#c9d1d9;font-size:13px}
main{padding:8px 24px 40px;max-width:1400px}
h2{font-size:16px;border-bottom:1px solid #d6d6d6;padding-bottom:3px;margin-top:28px}
table{border-collapse:collapse;font-size:12.5px;margin:6px 0}
th,td{border-bottom:1px solid #e3e3e3;padding:3px 9px;text-align:left;vertical-align:top}
th{background:#eef0f2;position:sticky;top:0}
td.n,th.n{text-align:right;font-variant-numeric:tabular-nums}
tr.fail td:first-child{border-left:3px solid #b8002e}
img.plot{max-width:100%;height:auto;display:block;margin:6px 0;background:#fff}
.curves{display:grid;grid-template-columns:repeat(auto-fill,minmax(560px,1fr));gap:10px}
.note{background:#fff7e0;border-left:3px solid #c98a00;padding:6px 10px;margin:6px 0}
.kv td:first-child{color:#555;white-space:nowrap}
code,.mono{font-family:ui-monospace,SFMono-Regular,Menlo,monospace;font-size:12px}
.scroll{max-height:560px;overflow:auto;border:1px solid #e3e3e3}
"""

_JS = """
document.querySelectorAll('input[data-filter]').forEach(function (box) {
  var t = document.getElementById(box.getAttribute('data-filter'));
  if (!t) { return; }
  box.addEventListener('input', function () {
    var q = box.value.toLowerCase();
    t.querySelectorAll('tbody tr').forEach(function (tr) {
      tr.hidden = q !== '' && tr.textContent.toLowerCase().indexOf(q) < 0;
    });
  });
});
"""


def page(title: str, subtitle: str, body: Sequence[Html]) -> str:
    """A complete HTML document with the style sheet, the filter script and a strict CSP."""
    digest = base64.b64encode(hashlib.sha256(_JS.encode()).digest()).decode()
    csp = (f"default-src 'none'; img-src data:; style-src 'unsafe-inline'; "
           f"script-src 'sha256-{digest}'; base-uri 'none'; form-action 'none'")
    return (
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">\n"
        f'<meta http-equiv="Content-Security-Policy" content="{esc(csp)}">\n'
        '<meta name="viewport" content="width=device-width, initial-scale=1">\n'
        f"<title>{esc(title)}</title>\n<style>{_CSS}</style></head>\n<body>\n"
        f"<header><h1>{esc(title)}</h1><p>{esc(subtitle)}</p></header>\n<main>\n"
        + "\n".join(body)
        + f"\n</main>\n<script>{_JS}</script>\n</body></html>\n"
    )

"""A batch's summary files: ``summary.csv``, ``summary.json``, ``SHA256SUMS``, ``index.html``.

``summary.json`` holds the run (``run``: source, version, seconds, caution) and
one row per pair (:func:`stereomesh.batch.summary_row`); ``summary.csv`` the same
rows flat (lists joined by ``; ``, output hashes as ``path=sha256`` pairs);
``SHA256SUMS`` every output file of every finished pair in the format
``sha256sum -c`` checks, paths relative to the batch folder; ``index.html`` a
contact sheet that works offline: every image is a relative link to a pair's
own previews, styles are inline, nothing is fetched.
"""

from __future__ import annotations

import csv
import html
import io
import json
from pathlib import Path

from stereomesh.io.atomic import write_text_atomic

_CSV_FIRST = ("name", "status", "reason", "failed_stage", "attempts", "flags", "scale", "density",
              "occluded_fraction", "rectification_residual_px", "points", "vertices", "faces",
              "filled_fraction", "seconds", "disparity_seconds", "peak_memory_mb")


def _cell(value) -> str:
    if value is None:
        return ""
    if isinstance(value, float):
        return f"{value:.6g}"
    if isinstance(value, list):
        return "; ".join(map(str, value))
    if isinstance(value, dict):
        return "; ".join(f"{k}={v}" for k, v in value.items())
    return str(value)


def summary_csv(rows: list[dict]) -> str:
    """The rows as CSV text, fixed columns first, then ``meta.*``, inputs and hashes.

    Examples
    --------
    >>> print(summary_csv([{"name": "a", "status": "done", "flags": ["unscaled"]}]).strip())
    name,status,reason,failed_stage,attempts,flags,scale,density,occluded_fraction,\
rectification_residual_px,points,vertices,faces,filled_fraction,seconds,disparity_seconds,\
peak_memory_mb,inputs,outputs_sha256
    a,done,,,,unscaled,,,,,,,,,,,,,
    """
    meta = sorted({k for r in rows for k in r if k.startswith("meta.")})
    columns = [*_CSV_FIRST, *meta, "inputs", "outputs_sha256"]
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(columns)
    for r in rows:
        writer.writerow([_cell(r.get(c)) for c in columns])
    return buf.getvalue()


def _pct(value) -> str:
    return "" if not isinstance(value, int | float) else f"{value:.1%}"


def _figures(row: dict) -> list[tuple[str, str]]:
    out = [("density", _pct(row.get("density"))), ("occluded", _pct(row.get("occluded_fraction")))]
    if isinstance(row.get("rectification_residual_px"), int | float):
        out.append(("rect. residual", f"{row['rectification_residual_px']:.2f} px"))
    out += [("scale", row.get("scale") or ""),
            ("faces", "" if row.get("faces") is None else f"{row['faces']:,}"),
            ("filled", _pct(row.get("filled_fraction"))),
            ("time", "" if row.get("seconds") is None else f"{row['seconds']:.1f} s")]
    out += [(k[5:], str(v)) for k, v in row.items() if k.startswith("meta.") and v]
    return [(k, v) for k, v in out if v]


_STYLE = """
body{font:14px/1.4 sans-serif;margin:1.5em;color:#222;background:#fafafa}
h1{font-size:1.4em;margin:0 0 .3em}.caution{background:#fff4d6;border:1px solid #e0c36a;
padding:.5em .8em;margin:.8em 0}.grid{display:flex;flex-wrap:wrap;gap:14px;align-items:flex-start}
.pair{background:#fff;border:1px solid #ccc;border-radius:6px;padding:8px;width:420px}
.pair.flagged{border-color:#d08a00;box-shadow:0 0 0 2px #f3c66b}
.pair.failed{border-color:#c33;background:#fff3f3}.thumbs{display:flex;gap:4px}
.thumbs img{width:206px;height:155px;object-fit:contain;background:#eee}
h2{font-size:1.05em;margin:0 0 4px}.status{font-weight:normal;font-size:.85em;color:#555}
dl{display:grid;grid-template-columns:auto 1fr;gap:0 .8em;margin:.4em 0}dt{color:#666}
dd{margin:0}.flag{display:inline-block;background:#f3c66b;border-radius:3px;padding:0 5px;
margin:2px 3px 0 0;font-size:.85em}.reason{color:#a00;white-space:pre-wrap;font-size:.9em}
"""


def contact_sheet(rows: list[dict], run: dict) -> str:
    """``index.html`` text: a card per pair with its thumbnails, figures, flags or reason."""
    e = html.escape
    done = sum(r["status"] in ("done", "skipped") for r in rows)
    failed = sum(r["status"] == "failed" for r in rows)
    flagged = sum(bool(r.get("flags")) for r in rows)
    cards = []
    for r in rows:
        name = r["name"]
        ok = r["status"] in ("done", "skipped")
        cls = "pair" + (" failed" if r["status"] == "failed" else "") + \
            (" flagged" if r.get("flags") else "")
        parts = [f'<section class="{cls}" data-pair="{e(name)}" data-status="{e(r["status"])}">',
                 f'<h2>{e(name)} <span class="status">{e(r["status"])}</span></h2>']
        if ok:
            base = f"{name}/previews/"
            parts.append('<div class="thumbs">'
                         f'<img src="{e(base)}disparity.png" alt="disparity of {e(name)}" '
                         'loading="lazy">'
                         f'<img src="{e(base)}mesh.png" alt="mesh render of {e(name)}" '
                         'loading="lazy"></div>')
        for flag in r.get("flags") or []:
            parts.append(f'<span class="flag">{e(flag)}</span>')
        if r["status"] == "failed":
            parts.append(f'<p class="reason">stage {e(str(r.get("failed_stage") or "?"))}: '
                         f'{e(str(r.get("reason") or ""))}</p>'
                         f'<p><a href="{BATCH_LINK}failed/{e(name)}/log.txt">log</a></p>')
        figures = _figures(r)
        if figures:
            parts.append("<dl>" + "".join(f"<dt>{e(k)}</dt><dd>{e(v)}</dd>" for k, v in figures)
                         + "</dl>")
        if ok:
            parts.append(f'<p><a href="{e(name)}/report.json">report</a> · '
                         f'<a href="{e(name)}/mesh.ply">mesh</a></p>')
        parts.append("</section>")
        cards.append("".join(parts))
    # Counted by the page itself once loaded, so a reader (or a test) can tell that
    # every thumbnail was found next to the page.
    script = ("<script>window.addEventListener('load',function(){var i=document.images,n=0;"
              "for(var k=0;k<i.length;k++){if(i[k].complete&&i[k].naturalWidth>0)n++;}"
              "document.body.setAttribute('data-images-loaded',n);"
              "document.body.setAttribute('data-images',i.length);});</script>")
    return (
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
        "<title>stereomesh batch</title>"
        f"<style>{_STYLE}</style></head><body data-pairs=\"{len(rows)}\">"
        f"<h1>stereomesh batch: {len(rows)} pairs</h1>"
        f"<p>{done} finished, {failed} failed, {flagged} flagged for a look; source "
        f"{e(str(run.get('source', '')))}; stereomesh {e(str(run.get('version', '')))}. "
        "Flags: low density, high rectification residual, unscaled, many filled vertices. "
        "Files: <a href=\"summary.csv\">summary.csv</a>, <a href=\"summary.json\">summary.json"
        "</a>, <a href=\"SHA256SUMS\">SHA256SUMS</a>, <a href=\"batch.log\">batch.log</a>.</p>"
        f"<p class=\"caution\">{e(run.get('caution', ''))}</p>"
        f"<div class=\"grid\">{''.join(cards)}</div>{script}</body></html>\n"
    )


BATCH_LINK = "_batch/"


def write_summary(out_dir: str | Path, rows: list[dict], run: dict) -> None:
    """Write the four summary files of a batch into ``out_dir``, each atomically."""
    out_dir = Path(out_dir)
    write_text_atomic(out_dir / "summary.json",
                      json.dumps({"run": run, "pairs": rows}, indent=2, default=str) + "\n")
    write_text_atomic(out_dir / "summary.csv", summary_csv(rows))
    sums = "".join(f"{digest}  {r['name']}/{rel}\n" for r in rows
                   if r["status"] in ("done", "skipped")
                   for rel, digest in (r.get("outputs_sha256") or {}).items())
    write_text_atomic(out_dir / "SHA256SUMS", sums)
    write_text_atomic(out_dir / "index.html", contact_sheet(rows, run))

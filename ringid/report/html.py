"""report.html: one self-contained page (standard library only) from a results folder."""

from __future__ import annotations

import base64
import csv
import html
import os
from pathlib import Path

from ringid import __version__
from ringid.core.atomic import write_text
from ringid.core.errors import RingidError
from ringid.core.records import CalibrationRecord, read_calibration_record
from ringid.report.summary import SCREENING_NOTE, _load_json, _num, load_sample_record, write_summary

_CSS = """
body{font-family:system-ui,-apple-system,Segoe UI,Roboto,sans-serif;margin:0 auto;max-width:1500px;padding:0 16px 40px;color:#1d232a}
h1{font-size:1.6em;margin:.8em 0 .2em} h2{border-bottom:2px solid #d6dde5;padding-bottom:4px;margin-top:1.6em}
h3{margin:1.2em 0 .3em} .note{background:#fff6dc;border-left:5px solid #e0a800;padding:8px 12px;margin:12px 0}
table{border-collapse:collapse;font-size:.86em;margin:6px 0} th,td{border:1px solid #d6dde5;padding:3px 7px;text-align:left;vertical-align:top}
th{background:#eef2f6;cursor:pointer;user-select:none} tr:nth-child(even) td{background:#f8fafc}
td.num{text-align:right;font-variant-numeric:tabular-nums} .failed td{background:#fde8e8 !important}
.sample{border:1px solid #d6dde5;border-radius:6px;padding:8px 14px;margin:14px 0;content-visibility:auto;
contain-intrinsic-size:auto 520px} summary{cursor:pointer;color:#2471a3;font-size:.9em}
.meta{color:#52606d;font-size:.9em} .tag{display:inline-block;background:#e6eef7;border-radius:3px;padding:0 5px;margin:1px 2px;font-size:.85em}
.err{color:#a61b1b} img{max-width:100%;height:auto} input{padding:4px 8px;margin:6px 0;width:320px}
.tablebox{max-height:75vh;overflow:auto;border:1px solid #d6dde5;margin:6px 0} .tablebox table{margin:0}
.tablebox th{position:sticky;top:0;z-index:1} .tablebox td{max-width:24em}
.back{float:right;font-size:.85em}
"""

_JS = """
function sortTable(th){const t=th.closest('table'),i=[...th.parentNode.children].indexOf(th),
rows=[...t.tBodies[0].rows],asc=th.dataset.asc!=='1';th.dataset.asc=asc?'1':'0';
rows.sort((a,b)=>{const x=a.cells[i].innerText,y=b.cells[i].innerText,nx=parseFloat(x),ny=parseFloat(y);
const c=(!isNaN(nx)&&!isNaN(ny))?nx-ny:x.localeCompare(y);return asc?c:-c});rows.forEach(r=>t.tBodies[0].appendChild(r));}
function filterTable(inp){const q=inp.value.toLowerCase();for(const r of document.getElementById('summary').tBodies[0].rows){
r.style.display=r.innerText.toLowerCase().includes(q)?'':'none';}}
"""


def _e(x) -> str:
    return html.escape(str(x), quote=True)


REPORT_FIGURES = ("auto", "inline", "linked")
INLINE_MAX_SAMPLES = 100  # "auto": figures inside the page up to this many samples (about 85 kB each)


def _img(path: Path, alt: str, link_from: Path | None = None) -> str:
    """A figure: inside the page (base64), or with ``link_from`` (the page's folder) a relative link
    to the PNG file, loaded only when it scrolls into view."""
    if link_from is not None:
        if not path.is_file():
            return f'<p class="meta">(no figure: {_e(path.name)})</p>'
        rel = os.path.relpath(path, link_from).replace(os.sep, "/")
        return f'<img alt="{_e(alt)}" loading="lazy" src="{_e(rel)}">'
    try:
        data = path.read_bytes()
    except OSError:
        return f'<p class="meta">(no figure: {_e(path.name)})</p>'
    return f'<img alt="{_e(alt)}" src="data:image/png;base64,{base64.b64encode(data).decode()}">'


def _table(
    header: list[str], rows: list[list], *, table_id: str = "", numeric: set[int] = frozenset(), row_class=None,
    link_first: str = "", boxed: bool = False,
) -> str:
    """An HTML table of text cells (escaped); ``link_first``: the first column links to ``#{link_first}{value}``;
    ``boxed``: in its own scrolling box with the header row kept visible."""
    id_attr = f' id="{_e(table_id)}"' if table_id else ""
    out = ['<div class="tablebox">' if boxed else "", f"<table{id_attr}><thead><tr>"]
    out += [f'<th onclick="sortTable(this)">{_e(h)}</th>' for h in header]
    out.append("</tr></thead><tbody>")
    for k, row in enumerate(rows):
        cls = row_class(k) if row_class else ""
        out.append(f'<tr class="{_e(cls)}">' if cls else "<tr>")
        for i, v in enumerate(row):
            if i == 0 and link_first:
                out.append(f'<td><a href="#{_e(link_first)}{_e(v)}">{_e(v)}</a></td>')
            else:
                out.append(f'<td class="num">{_e(v)}</td>' if i in numeric else f"<td>{_e(v)}</td>")
        out.append("</tr>")
    out.append("</tbody></table>" + ("</div>" if boxed else ""))
    return "".join(out)


def _read_csv(path: Path) -> list[dict]:
    try:
        with open(path, newline="", encoding="utf-8") as fh:
            return list(csv.DictReader(fh))
    except OSError:
        return []


def _sample_section(row: dict, sample_dir: Path, link_from: Path | None = None) -> str:
    rec = load_sample_record(row["sample"], sample_dir)
    ident = _load_json(sample_dir / "identification.json")
    parts = [f'<div class="sample" id="s-{_e(row["sample"])}"><a class="back" href="#summary-section">↑ summary</a>'
             f'<h3>{_e(row["sample"])}</h3>']
    meta = [f"status: <b>{_e(row['status'])}</b>", f"crystallinity: <b>{_e(row['crystallinity'] or '—')}</b>"]
    if row["phases"]:
        conf = row["confidence"].split(";")
        meta.append("phases: " + ", ".join(f"<b>{_e(p)}</b> ({_e(c)})" for p, c in zip(row["phases"].split(";"), conf)))
    else:
        meta.append("phases: none identified")
    if row["alternatives"]:
        meta.append(f"cannot be told apart from: {_e(row['alternatives'].replace(';', ', '))}")
    if _size_text(row):
        spread = ""
        if row["crystallite_size_nm"] and row["crystallite_size_sigma_nm"]:
            spread = (f" ± {row['crystallite_size_sigma_nm']} (statistical) ± {row['crystallite_size_systematic_nm']}"
                      " (systematic, the line-shape model's measured bias)")
        meta.append(f"crystallite size: {_e(_size_text(row) + spread)} nm")
    if row["ring_character"]:
        kinds = row["ring_character"].split(";")
        meta.append("rings: " + _e(", ".join(kinds[:-1]) + " and " + kinds[-1] if len(kinds) > 1 else kinds[0]))
    if row["fractions_rough"] and len(row["phases"].split(";")) > 1:
        pairs = ", ".join(f"{p} {f}" for p, f in zip(row["phases"].split(";"), row["fractions_rough"].split(";")))
        meta.append(f"rough shares of the crystalline phases (from ring areas): {_e(pairs)}")
    parts.append('<p class="meta">' + " · ".join(meta) + "</p>")
    trust = _trust_line(row, ident, sample_dir)
    if trust:
        parts.append(f'<p class="meta">{trust}</p>')
    if row["note"]:
        parts.append(f'<p class="meta">note: {_e(row["note"])}</p>')
    if row["error"]:
        parts.append(f'<p class="err">error: {_e(row["error"])}</p>')
    if row["flags"]:
        parts.append("<p>" + "".join(f'<span class="tag">{_e(f)}</span>' for f in row["flags"].split(";")) + "</p>")
    if (sample_dir / "overview.png").exists():
        parts.append(_img(sample_dir / "overview.png", f"overview of {row['sample']}", link_from))
    rings = _read_csv(sample_dir / "rings.csv")
    if rings:
        cols = [c for c in ("kind", "g_per_nm", "d_angstrom", "d_sigma_angstrom", "fwhm_per_nm", "area", "size_nm",
                            "character", "phase", "hkl", "double_diffraction") if c in rings[0]]
        fmt = {
            "g_per_nm": ".4f",
            "d_angstrom": ".4f",
            "d_sigma_angstrom": ".4f",
            "fwhm_per_nm": ".3f",
            "area": ".4g",
            "size_nm": ".3g",
        }
        body = [[_num(r[c], fmt[c]) if c in fmt and r[c] not in ("", None) else r[c] for c in cols] for r in rings]
        parts.append(f"<details><summary>rings table ({len(rings)} rings)</summary>"
                     + _table(cols, body, numeric={i for i, c in enumerate(cols) if c in fmt}) + "</details>")
    parts += _identification_notes(ident)
    if rec.geometry is not None:
        geo = rec.to_json()["geometry"]
        parts.append(
            '<p class="meta">geometry: ' + ", ".join(f"{_e(k)} = {_e(_num(v, '.6g'))}" for k, v in geo.items()) + "</p>"
        )
    parts.append("</div>")
    return "".join(parts)


def _size_text(row: dict) -> str:
    """The crystallite size of a summary row as shown: a number, or "> N" for a lower limit (nm)."""
    if row["crystallite_size_nm"]:
        return row["crystallite_size_nm"]
    return f"> {row['crystallite_size_lower_limit_nm']}" if row["crystallite_size_lower_limit_nm"] else ""


def _failure_note(rows: list[dict]) -> list[str]:
    """A box naming the failed samples (each linked to its section, which says why)."""
    failed = [r for r in rows if r["status"] != "ok"]
    if not failed:
        return []
    links = ", ".join(f'<a href="#s-{_e(r["sample"])}">{_e(r["sample"])}</a>' for r in failed)
    return [f'<div class="note err"><b>{len(failed)} sample(s) failed</b>: {links}. Each one\'s section gives '
            "the reason; the others were analysed.</div>"]


def _library_note(results: Path) -> list[str]:
    """A warning box naming the CIFs that did not build: no sample was compared with those phases."""
    from ringid.library.store import unavailable_phases

    try:
        failed = unavailable_phases(results / "library")
    except RingidError:
        return []
    if not failed:
        return []
    items = "; ".join(f"<b>{_e(p)}</b> ({_e(e)})" for p, e in failed)
    return [f'<div class="note err"><b>Library incomplete.</b> {len(failed)} CIF(s) could not be built, so no sample '
            f"was compared with these phases: {items}. A sample made of one of them comes out unidentified or "
            "as a look-alike; fix the CIF and rerun (the image work is not redone).</div>"]


def _trust_line(row: dict, ident: dict, sample_dir: Path) -> str:
    """What bears on how far to trust the answer: rings left unexplained (count and intensity share),
    the best phase not reported and its score, and the look-alikes."""
    if row["status"] != "ok" or not ident or not row["n_rings"] or row["n_rings"] == "0":
        return ""
    n_unexp = len(ident.get("unexplained", []))
    share = ident.get("unexplained_intensity_share")
    out = [f"unexplained: {n_unexp} of {row['n_rings']} rings"
           + (f" ({float(share):.0%} of the ring intensity)" if n_unexp and isinstance(share, (int, float)) else "")]
    answer = set(ident.get("phases", []))
    best = ident_score = None
    for r in _read_csv(sample_dir / "phases.csv"):
        if r.get("in_answer") == "true" and ident_score is None:
            ident_score = r.get("score")
        if r.get("phase") not in answer and best is None:
            best = r
    if best is not None:
        text = f"best phase not reported: {_e(best['phase'])} (score {_num(best['score'], '.1f')}"
        if ident_score:
            text += f" against {_num(ident_score, '.1f')} for the answer"
        p, rate = best.get("false_identification_probability"), (ident.get("settings") or {}).get(
            "false_identification_rate")
        if p and isinstance(rate, (int, float)):
            text += (f"; significant on its own, p = {_num(p, '.2g')}: it fits these rings too" if float(p) < rate
                     else f"; not significant on its own, p = {_num(p, '.2g')}")
        out.append(text + ")")
    looks = [a for group in ident.get("alternatives", []) for a in group]
    out.append("look-alikes within the window: " + (_e(", ".join(looks)) if looks else "none"))
    return " · ".join(out)


def _identification_notes(ident: dict) -> list[str]:
    """The report's plain sentences about what the library could not explain or would not accept."""
    out = []
    if ident.get("unexplained"):
        share = ident.get("unexplained_intensity_share")
        share_text = f" ({float(share):.0%} of the ring intensity)" if isinstance(share, (int, float)) else ""
        out.append('<p class="meta"><b>rings not explained by the library</b>' + _e(share_text) + ": d = "
                   + ", ".join(_num(u["d_angstrom"], ".4f") for u in ident["unexplained"]) + " Å</p>")
    for m in ident.get("lattice_mismatch", []):
        dil, sig = m.get("dilation"), m.get("dilation_sigma")
        if isinstance(dil, (int, float)):
            sig_text = f" ± {float(sig) * 100:.2f}" if isinstance(sig, (int, float)) else ""
            out.append(f'<p class="meta">{_e(m.get("phase", ""))} fits only with its lattice scaled by '
                       f"{(float(dil) - 1) * 100:+.2f}{_e(sig_text)} %, outside the calibration's window: "
                       "a different phase of the same structure type, or a calibration that is off.</p>")
    elements = ident.get("elements") or []
    if elements:
        within = ident.get("phases_within_elements")
        count = f" ({within} library phase{'s' if within != 1 else ''})" if isinstance(within, int) else ""
        out.append(f'<p class="meta">Searched only the phases made of {_e(" ".join(elements))}{_e(count)}, '
                   "as the sample sheet's elements column says.</p>")
    for m in ident.get("better_match_outside_elements", []):
        p = m.get("false_identification_probability")
        p_text = f", false-identification probability {float(p):.2g}" if isinstance(p, (int, float)) else ""
        out.append(f'<p class="meta"><b>A far better match outside the elements:</b> {_e(m.get("phase", ""))} '
                   f"({_e(' '.join(m.get('elements') or []))}; score {_num(m.get('score'), '.1f')}{_e(p_text)}) "
                   "would have been reported without the restriction and scores well above the answer within "
                   "the elements: check the sample's elements.</p>")
    for m in ident.get("not_significant", []):
        p = m.get("false_identification_probability")
        if isinstance(p, (int, float)):
            out.append(f'<p class="meta">{_e(m.get("phase", ""))} was not reported: a phase absent from the sample '
                       f"would score as well with probability {float(p):.2g}.</p>")
    return out


def write_report(
    results_dir: str | os.PathLike, samples: list[str], calibrations: list[str], *, title: str = "ringid report",
    figures: str = "auto", series: list[str] = (),
) -> Path:
    """Write ``summary.csv`` and ``report.html`` under ``results_dir``; return the report path.

    ``figures``: ``inline`` puts every figure inside the page (one file to pass on, ~85 kB per
    sample); ``linked`` links the PNG files beside it, loaded as they scroll into view (a page of
    1,000 samples stays small and opens at once, but needs the results folder kept together);
    ``auto`` is inline up to INLINE_MAX_SAMPLES samples, else linked.
    """
    if figures not in REPORT_FIGURES:
        raise RingidError(None, f"figures must be one of {', '.join(REPORT_FIGURES)}, got {figures!r}")
    results = Path(results_dir)
    rows = write_summary(results, samples)
    linked = figures == "linked" or (figures == "auto" and len(samples) > INLINE_MAX_SAMPLES)
    link_from = results if linked else None
    n_ok = sum(r["status"] == "ok" for r in rows)
    counts: dict[str, int] = {}
    for r in rows:
        label = r["crystallinity"] or "not measured"
        counts[label] = counts.get(label, 0) + 1
    parts = ["<!DOCTYPE html><html lang=en><head><meta charset=utf-8>",
             f"<title>{_e(title)}</title><style>{_CSS}</style><script>{_JS}</script></head><body>",
             f"<h1>{_e(title)}</h1>",
             f'<p class="meta">{len(rows)} samples: {n_ok} ok, {len(rows) - n_ok} failed · '
             + ", ".join(f"{_e(k)}: {v}" for k, v in sorted(counts.items())) + f" · ringid {__version__}</p>",
             f'<div class="note"><b>Screening result.</b> {_e(SCREENING_NOTE)}</div>',
             *_library_note(results),
             *([f'<p class="meta">The figures are the PNG files of {_e(results.name)}/ beside this page: keep the '
                "folder together, or write a one-file report with report.figures: inline.</p>"] if linked else []),
             *_failure_note(rows),
             '<h2 id="summary-section">Summary</h2>', '<input placeholder="filter rows (phase, flag, sample…)" oninput="filterTable(this)">']
    parts.append(_summary_table(rows))
    parts += _calibration_section(results, calibrations, link_from)
    parts += _series_section(results, series, link_from)
    parts.append("<h2>Samples</h2>")
    for r in rows:
        parts.append(_sample_section(r, results / "samples" / r["sample"], link_from))
    parts += _library_section(results)
    parts.append("</body></html>\n")
    path = results / "report.html"
    write_text(path, "".join(parts))
    return path


def _summary_table(rows: list[dict]) -> str:
    """The summary table: in its own scrolling box, sample names linked to their sections."""
    cols = ["sample", "status", "crystallinity", "phases", "alternatives", "confidence", "crystallite_size_nm",
            "n_rings", "unexplained_rings", "ellipticity", "flags", "error"]
    spaced = ("phases", "alternatives", "confidence", "flags")  # ";" lists with room to wrap

    def cell(r, c):
        if c == "crystallite_size_nm":
            return _size_text(r)
        if c == "flags":  # library_incomplete holds for every sample: the box above says it once
            return "; ".join(f for f in r[c].split(";") if f and f != "library_incomplete")
        return r[c].replace(";", "; ") if c in spaced else r[c]

    body = [[cell(r, c) for c in cols] for r in rows]
    return _table(cols, body, table_id="summary", numeric={6, 7, 8, 9}, link_first="s-", boxed=True,
                  row_class=lambda k: "failed" if rows[k]["status"] != "ok" else "")


def _calibration_section(results: Path, calibrations: list[str], link_from: Path | None) -> list[str]:
    """The calibrations table and each calibration's figure."""
    parts = ["<h2>Calibrations</h2>"]
    cal_rows = []
    for cal in calibrations:
        try:
            rec = read_calibration_record(results / "calibrations" / f"{cal}.json", require_ok=False)
        except RingidError as exc:
            rec = CalibrationRecord(cal, kind="", status="failed", error=str(exc))
        ok = rec.status == "ok"
        cal_rows.append([cal, rec.status, rec.kind, rec.standard, _num(rec.camera_constant_A_px, ".6g"),
                         _num(rec.camera_constant_sigma_A_px, ".2g"), _num(rec.ellipticity if ok else None, ".5f"),
                         _num(rec.ellipse_angle_deg if ok else None, ".2f"), _num(rec.voltage_kv, "g"), rec.error])
    parts.append(_table(["calibration", "status", "kind", "standard", "K (Å·px)", "σK", "ellipticity", "angle (°)",
                         "kV", "error"], cal_rows, numeric={4, 5, 6, 7, 8}))
    for cal in calibrations:
        fig = results / "calibrations" / f"{cal}.png"
        if fig.exists():
            parts.append(f"<h3>{_e(cal)}</h3>" + _img(fig, f"calibration of {cal}", link_from))
    return parts


def _series_section(results: Path, series, link_from: Path | None) -> list[str]:
    """Each series' figure, with a link to its table and the members shown as gaps."""
    if not series:
        return []
    parts = ['<h2 id="series-section">Series</h2>']
    for name in series:
        fig = results / "series" / f"{name}.png"
        table = _read_csv(results / "series" / f"{name}.csv")
        gaps = [r["sample"] for r in table
                if r.get("status") != "ok" or not (r.get("phases") or r.get("crystallinity") == "amorphous")]
        parts.append(f"<h3>{_e(name)}</h3><p class=\"meta\">{len(table)} samples (table: "
                     f'<a href="series/{_e(name)}.csv">series/{_e(name)}.csv</a>)'
                     + (f"; shown as gaps (failed or unidentified): {_e(', '.join(gaps))}" if gaps else "")
                     + "</p>" + (_img(fig, f"series {name}", link_from) if table else
                                 '<p class="meta">no sample gives a value of its variable</p>'))
    return parts


def _library_section(results: Path) -> list[str]:
    """The phase library's index table."""
    index = _read_csv(results / "library" / "index.csv")
    if not index:
        return ["<h2>Phase library</h2>"]
    cols = ["phase", "formula", "space_group", "a", "b", "c", "alpha", "beta", "gamma", "n_rings", "status", "error",
            "title"]
    return ["<h2>Phase library</h2>",
            _table(cols, [[r.get(c, "") for c in cols] for r in index], numeric={3, 4, 5, 6, 7, 8, 9})]

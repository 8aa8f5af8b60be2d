"""``report.html``: one page that carries its figures inside it.

Everything the page needs is in the file: figures as base64 PNG, tables as
HTML, the style sheet inline. There is no script and no address outside the
file, so it opens the same from a mail attachment, a shared drive or a CI
artifact with no network.
"""

from __future__ import annotations

import base64
import datetime as _dt
import html
import os
from dataclasses import dataclass, field

import pandas as pd

#: rows of a table shown in the page before it is cut (the CSV has them all)
MAX_ROWS = 25

CAUTION = ("These are diagnostics of the particle dumps, not a certification of the "
           "simulation. Conserved totals, load figures and migration counts describe what is "
           "in the files; whether a run is fit for its purpose is decided by your own "
           "verification, your local codes of practice and licensed professional judgement.")


@dataclass
class FigureItem:
    """One PNG on disk to embed, with the words under it."""

    path: str
    title: str
    caption: str = ""
    wide: bool = False          # spans the whole width of the page (panels of small plots)
    kind: str = ""              # what the figure shows (space, phase, totals...), for grouping


@dataclass
class TableItem:
    """A table to show (cut to ``max_rows``) with the name of its full CSV."""

    title: str
    frame: pd.DataFrame
    csv_name: str | None = None
    max_rows: int = MAX_ROWS
    caption: str = ""
    subset: str = ""                 # what part of the full table ``frame`` is ("the last snapshot")
    total_rows: int | None = None    # rows of the full table when ``frame`` is a part of it


@dataclass
class MovieItem:
    """One movie file to embed (MP4 as a video, GIF/WebP as an image), with the words under it."""

    path: str
    title: str
    caption: str = ""


@dataclass
class Section:
    title: str
    figures: list[FigureItem] = field(default_factory=list)
    tables: list[TableItem] = field(default_factory=list)
    text: list[str] = field(default_factory=list)      # plain sentences (escaped)
    anchor: str = ""
    movies: list[MovieItem] = field(default_factory=list)


@dataclass
class Verdict:
    """The gate: ``ok`` within the band, else the lines naming what left it."""

    rtol: float
    ok: bool
    lines: list[str] = field(default_factory=list)
    head: str = ""              # the headline, when it is not the drift check's


_CSS = """
:root { --ink:#1f2430; --muted:#5d6472; --line:#dcd8cf; --paper:#fbfaf7; --card:#ffffff;
        --accent:#2b5c8a; --good:#1f7a4d; --good-bg:#e6f4ec; --bad:#a4262c; --bad-bg:#fbe9ea; }
* { box-sizing: border-box; }
body { margin:0; background:var(--paper); color:var(--ink);
       font: 15px/1.5 "Segoe UI", "Helvetica Neue", Arial, sans-serif; }
header { background:#22303f; color:#f4f1ea; padding:22px 32px 18px; }
header h1 { margin:0; font-size:24px; font-weight:600; letter-spacing:.2px; }
header .sub { color:#c9d2dc; font-size:13px; margin-top:4px; }
nav { padding:10px 32px; border-bottom:1px solid var(--line); background:#f3f1ec; font-size:13px; }
nav a { color:var(--accent); text-decoration:none; margin-right:16px; }
main { max-width:1240px; margin:0 auto; padding:18px 32px 40px; }
section { margin-top:26px; }
h2 { font-size:19px; margin:0 0 10px; padding-bottom:4px; border-bottom:2px solid var(--line); }
h3 { font-size:15px; margin:18px 0 6px; color:var(--muted); font-weight:600; }
.verdict { border-radius:6px; padding:12px 16px; margin-top:18px; font-weight:500; }
.verdict.ok { background:var(--good-bg); border-left:6px solid var(--good); }
.verdict.bad { background:var(--bad-bg); border-left:6px solid var(--bad); }
.verdict ul { margin:6px 0 0 18px; padding:0; font-weight:400; }
.facts { display:grid; grid-template-columns: max-content 1fr; gap:4px 18px; background:var(--card);
         border:1px solid var(--line); border-radius:6px; padding:12px 16px; }
.facts dt { color:var(--muted); }
.facts dd { margin:0; }
.grid { display:grid; grid-template-columns: repeat(auto-fill, minmax(520px, 1fr)); gap:16px; }
figure { margin:0; background:var(--card); border:1px solid var(--line); border-radius:6px;
         padding:8px; }
figure img, figure video { width:100%; height:auto; display:block; }
figure.wide { grid-column: 1 / -1; max-width: 1000px; justify-self: center; width: 100%; }
figcaption { font-size:13px; color:var(--muted); padding:6px 4px 2px; }
figcaption b { color:var(--ink); font-weight:600; }
.table-wrap { overflow-x:auto; background:var(--card); border:1px solid var(--line);
              border-radius:6px; }
table.data { border-collapse:collapse; font-size:13px; width:100%;
             font-variant-numeric: tabular-nums; }
table.data th { background:#eef0f3; text-align:right; padding:5px 9px; border-bottom:1px solid var(--line);
                position:sticky; top:0; }
table.data td { text-align:right; padding:3px 9px; border-bottom:1px solid #eeece6; }
table.data tr:nth-child(even) td { background:#faf9f6; }
table.data td.text, table.data th.text { text-align:left; }
.trim { font-size:13px; color:var(--muted); margin:4px 2px 0; }
.notes li { margin-bottom:3px; }
.caution { margin-top:30px; padding:12px 16px; border:1px dashed #b8b2a6; border-radius:6px;
           font-size:13px; color:var(--muted); background:#f6f4ef; }
footer { font-size:12px; color:var(--muted); text-align:center; padding:16px; }
@media print { nav { display:none; } figure, table { break-inside: avoid; } }
"""


def _e(text) -> str:
    return html.escape(str(text), quote=True)


def png_data_uri(path: str) -> str:
    return data_uri(path, "image/png")


def data_uri(path: str, mime: str) -> str:
    """The file as a ``data:`` address, so the page carries it inside."""
    with open(path, "rb") as fh:
        data = fh.read()
    return f"data:{mime};base64," + base64.b64encode(data).decode("ascii")


_MOVIE_MIME = {".mp4": "video/mp4", ".gif": "image/gif", ".webp": "image/webp"}


def _movie_html(m: MovieItem) -> str:
    name = os.path.basename(m.path)
    mime = _MOVIE_MIME.get(os.path.splitext(name)[1].lower(), "application/octet-stream")
    cap = f"<b>{_e(m.title)}</b>" + (f" — {_e(m.caption)}" if m.caption else "")
    if mime.startswith("video/"):
        body = (f"<video controls loop muted playsinline preload='metadata' data-file='{_e(name)}' "
                f"src='{data_uri(m.path, mime)}'></video>")
    else:
        body = f"<img src='{data_uri(m.path, mime)}' alt='{_e(m.title)}' data-file='{_e(name)}'>"
    return f"<figure class='movie'>{body}<figcaption>{cap}</figcaption></figure>"


def _format_cell(v) -> str:
    if v is None or v is pd.NA or v is pd.NaT:
        return "–"
    if isinstance(v, float):
        if v != v:
            return "–"
        if v == int(v) and abs(v) < 1e15:
            return f"{int(v):,}" if abs(v) >= 1e4 else f"{int(v)}"
        a = abs(v)
        if a != 0 and (a < 1e-3 or a >= 1e6):
            return f"{v:.4e}"
        return f"{v:.6g}"
    if isinstance(v, (int,)) and not isinstance(v, bool):
        return f"{v:,}" if abs(v) >= 1e4 else str(v)
    return str(v)


def table_html(item: TableItem) -> str:
    df = item.frame
    n = len(df)
    shown = df.head(item.max_rows) if n > item.max_rows else df
    cols = list(shown.columns)
    text_cols = {c for c in cols if not pd.api.types.is_numeric_dtype(shown[c])}
    head = "".join(f"<th class='text'>{_e(c)}</th>" if c in text_cols else f"<th>{_e(c)}</th>"
                   for c in cols)
    body = []
    values = shown.to_numpy(dtype=object)
    for row in values:
        cells = []
        for c, v in zip(cols, row):
            cls = " class='text'" if c in text_cols else ""
            cells.append(f"<td{cls}>{_e(_format_cell(v))}</td>")
        body.append("<tr>" + "".join(cells) + "</tr>")
    out = [f"<div class='table-wrap'><table class='data'><thead><tr>{head}</tr></thead>"
           f"<tbody>{''.join(body)}</tbody></table></div>"]
    link = (f"<a href='{_e(item.csv_name)}'>{_e(item.csv_name)}</a>" if item.csv_name else "")
    bits = []
    if item.subset:
        bits.append(f"Rows of {_e(item.subset)}")
    if n > item.max_rows:
        bits.append(f"first {item.max_rows:,} of {n:,} shown" if bits else
                    f"First {item.max_rows:,} of {n:,} rows shown")
    text = ", ".join(bits) + ("." if bits else "")
    if link:
        total = item.total_rows if item.total_rows is not None else n
        full = "The full table" if (bits or total != n) else "Also in"
        text += (f" {full} ({total:,} rows) is in {link}." if full == "The full table"
                 else f"Also in {link}.")
    if text.strip():
        out.append(f"<p class='trim'>{text.strip()}</p>")
    if not n:
        out.append("<p class='trim'>No rows.</p>")
    return "\n".join(out)


def _section_html(sec: Section) -> str:
    anchor = sec.anchor or sec.title.lower().replace(" ", "-")
    parts = [f"<section id='{_e(anchor)}'><h2>{_e(sec.title)}</h2>"]
    for t in sec.text:
        parts.append(f"<p>{_e(t)}</p>")
    if sec.figures:
        parts.append("<div class='grid'>")
        for f in sec.figures:
            cap = f"<b>{_e(f.title)}</b>" + (f" — {_e(f.caption)}" if f.caption else "")
            name = os.path.basename(f.path)
            cls = " class='wide'" if f.wide else ""
            parts.append(f"<figure{cls}><img src='{png_data_uri(f.path)}' alt='{_e(f.title)}' "
                         f"data-file='{_e(name)}'><figcaption>{cap}</figcaption></figure>")
        parts.append("</div>")
    if sec.movies:
        parts.append("<div class='grid'>" + "".join(_movie_html(m) for m in sec.movies) + "</div>")
    for t in sec.tables:
        parts.append(f"<h3>{_e(t.title)}</h3>")
        if t.caption:
            parts.append(f"<p class='trim'>{_e(t.caption)}</p>")
        parts.append(table_html(t))
    parts.append("</section>")
    return "\n".join(parts)


def render_report(title: str, facts: list[tuple[str, str]], sections: list[Section],
                  verdict: Verdict | None = None, notes: list[str] | None = None,
                  generated: str | None = None, version: str = "") -> str:
    """The whole page as one string."""
    when = generated or _dt.datetime.now().astimezone().strftime("%Y-%m-%d %H:%M %Z")
    out = ["<!DOCTYPE html>", "<html lang='en'><head><meta charset='utf-8'>",
           "<meta name='viewport' content='width=device-width, initial-scale=1'>",
           f"<title>{_e(title)}</title><style>{_CSS}</style></head><body>",
           f"<header><h1>{_e(title)}</h1><div class='sub'>written {_e(when)} by swarmaudit "
           f"{_e(version)}</div></header>"]
    links = [("summary", "Summary")] + [(s.anchor or s.title.lower().replace(" ", "-"), s.title)
                                         for s in sections] + [("notes", "Notes")]
    out.append("<nav>" + "".join(f"<a href='#{_e(a)}'>{_e(t)}</a>" for a, t in links) + "</nav>")
    out.append("<main>")
    if verdict is not None:
        cls = "ok" if verdict.ok else "bad"
        band = f"±{verdict.rtol:g} ({verdict.rtol * 100:.3g} %)"
        head = verdict.head or (f"Check passed: every checked total stays within {band} of the first "
                                f"snapshot." if verdict.ok else f"Check failed: a total left the {band} band.")
        items = "".join(f"<li>{_e(line)}</li>" for line in verdict.lines)
        out.append(f"<div class='verdict {cls}' id='verdict'>{_e(head)}"
                   + (f"<ul>{items}</ul>" if items else "") + "</div>")
    out.append("<section id='summary'><h2>Summary</h2><dl class='facts'>")
    for k, v in facts:
        out.append(f"<dt>{_e(k)}</dt><dd>{_e(v)}</dd>")
    out.append("</dl></section>")
    for sec in sections:
        out.append(_section_html(sec))
    out.append("<section id='notes'><h2>Notes</h2>")
    if notes:
        out.append("<ul class='notes'>" + "".join(f"<li>{_e(n)}</li>" for n in notes) + "</ul>")
    else:
        out.append("<p>No notes.</p>")
    out.append("</section>")
    out.append(f"<div class='caution'>{_e(CAUTION)}</div>")
    out.append("</main><footer>swarmaudit report — figures and tables are also in this "
               "folder as PNG and CSV files.</footer></body></html>")
    return "\n".join(out)


def comparison_sections(comp, figures, summary: list[str]) -> list[Section]:
    """The sections of a comparison of two runs (``swarmaudit compare --out``).

    ``comp`` is an :class:`audit.compare.Comparison`; ``figures`` the
    :class:`FigureItem` records its figures were written as, each with a
    ``kind`` of ``space``, ``phase`` or ``totals``.
    """
    def figs(kind):
        return [f for f in figures if getattr(f, "kind", "") == kind]

    pr = comp.pairing
    text = list(summary)
    pairs = Section("Pairing and summary", text=text, anchor="comparison")
    out = [pairs]
    p = comp.particles
    if len(p):
        shown = p.drop(columns=["worst_ids"])
        out.append(Section("Particle by particle", tables=[
            TableItem("Matched particles, per paired snapshot and species", shown, "compare_particles.csv",
                      caption="Position differences in level-0 cells of the reference's layout (largest "
                              "axis, minimum image on periodic axes); momentum differences |Δu| relative "
                              "to the RMS |u| of the reference's matched particles."),
            TableItem("Particles that differ most", comp.worst, "compare_worst.csv",
                      caption="Ranked by position difference, per paired snapshot and species.")],
            anchor="compare-particles"))
    d = comp.distributions
    if len(d):
        out.append(Section("Distributions", tables=[
            TableItem("Per column: weighted Kolmogorov–Smirnov and first Wasserstein distance", d,
                      "compare_distributions.csv",
                      caption="p-values from Smirnov's large-sample form with Kish's effective sample "
                              "sizes; the Wasserstein distance is in the column's units.")],
            anchor="compare-distributions"))
    dens = figs("space") + figs("phase")
    if dens:
        out.append(Section("Density, both runs and their difference", figures=dens, anchor="compare-density",
                           text=["Each row: the reference, the candidate (same bins, same colour range) "
                                 "and candidate minus reference on a diverging scale centred on zero "
                                 "(red: more particles in the candidate, blue: fewer)."]))
    c = comp.census
    if len(c):
        chi = c.drop_duplicates(["ref_snapshot", "cand_snapshot", "species"])[
            ["ref_snapshot", "cand_snapshot", "species", "chi2", "chi2_dof", "chi2_pvalue"]]
        c2 = c.assign(count_difference=c["cand_count"] - c["ref_count"])
        worst = c2.reindex(c2["count_difference"].abs().sort_values(ascending=False, kind="stable").index)
        out.append(Section("Block census", tables=[
            TableItem("Chi-square test of homogeneity over the reference's blocks", chi, "compare_census.csv"),
            TableItem("Blocks whose counts differ most", worst.drop(columns=["chi2", "chi2_dof", "chi2_pvalue"]),
                      "compare_census.csv", subset="the blocks with the largest count difference",
                      total_rows=len(c))],
            text=["Both runs are counted in the blocks of the reference's layout, so a different "
                  "decomposition of the candidate is not itself a difference."],
            anchor="compare-census"))
    t = comp.totals
    if len(t):
        tot = figs("totals")
        shown = t[t["species"].astype(str) == "all"]
        out.append(Section("Totals side by side", figures=tot, tables=[
            TableItem("Totals of both runs (species all)", shown, "compare_totals.csv",
                      subset="species all", total_rows=len(t))], anchor="compare-totals"))
    return out


def write_report(path: str, text: str) -> str:
    tmp = f"{path}.part"
    with open(tmp, "w", encoding="utf-8") as fh:
        fh.write(text)
    os.replace(tmp, path)
    return path

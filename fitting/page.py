"""``report.html``: one page per fit, for any data, with no network assets.

The page is built from what a fit folder holds on disk — its tables (CSV),
its figures (PNG, linked beside the page) and ``report_data.json``
(:mod:`fitting.provenance`) — so ``fit`` (adapt–test and stream logs alike)
and ``compare`` produce the same page, and the demo's report is simply it.

Order of the page: what was fitted and how; flagged estimates and notes
first; the protocols with their plans; the group (with several observers);
every observer (flags, sessions with protocol hash and software, exclusions,
tables, figures); the comparison with predictions (after ``compare``); the
software; the files.  Every table is tagged with the CSV file it shows
(``data-csv``, relative to the page) and its numbers are that file's,
to four significant digits.

The page uses no script and no outside resource: it opens from a disk, a
share or an e-mail attachment (with the figures folder beside it).
"""

from __future__ import annotations

import html
import os
from pathlib import Path
from urllib.parse import quote

import numpy as np
import pandas as pd

from .flags import shared_notes
from .outputs import STAGING_PREFIX
from .provenance import read_report_data
from .tables import write_text

PAGE = "report.html"
GROUP = "group"
DIGITS = 4

#: Tables shown per observer (and for the group), in this order, with headings.
OBSERVER_TABLES = (
    ("tuning.csv", "Tuning per lag (DoG amplitude and peak offset)"),
    ("decay.csv", "Decay over lags"),
    ("decay_detail.csv", "Joint decay fit"),
    ("model_tests.csv", "Model tests"),
    ("aftereffect.csv", "After-effect: PSE shift per adapter offset and lag"),
    ("pse.csv", "PSE per condition"),
    ("fit_details.csv", "Fit details per condition"),
)
#: Tables with one row per condition or point: folded (click to open), after the figures.
FOLDED_TABLES = ("aftereffect.csv", "pse.csv", "fit_details.csv")
#: Figure name prefixes and what the figure shows.
FIGURE_CAPTIONS = {
    "psychometric": "Psychometric functions, one panel per condition",
    "tracks": "Test offsets trial by trial in every adaptive track",
    "aftereffect": "PSE shift against adapter offset, one colour per lag",
    "decay": "DoG amplitude per lag and the fitted exponential decay",
    "nback": "n-back amplitudes and the fitted decay",
    "comparison": "Measured after-effects (points, 95 % CIs) and predictions (lines); hollow points (one-sided, "
                  "too few trials for an interval, or a group cell of fewer than three observers) are left out "
                  "of χ², gain and the other agreement statistics, as the points table's in_statistics column says",
}

_STYLE = """
body { font-family: system-ui, sans-serif; max-width: 72em; margin: 1.5em auto; padding: 0 1em;
       color: #1d1d1d; line-height: 1.45; }
h1 { font-size: 1.45em; } h2 { font-size: 1.2em; margin-top: 2em; border-bottom: 1px solid #bbb; }
h3 { font-size: 1.02em; margin-top: 1.4em; }
nav ul { columns: 3; font-size: 0.9em; }
table { border-collapse: collapse; font-size: 0.82em; margin: 0.4em 0 1em; }
td, th { padding: 2px 7px; text-align: right; border-bottom: 1px solid #e4e4e4; }
th { background: #eef1f4; } td.text, th.text { text-align: left; }
tr.flagged td { background: #fff3cd; }
.flags { border-left: 4px solid #b7791f; background: #fffaf0; padding: 0.3em 0.8em; }
.ok { border-left: 4px solid #2f855a; background: #f0fff4; padding: 0.3em 0.8em; }
figure { display: inline-block; vertical-align: top; margin: 0.4em 0.6em 0.8em 0; max-width: 100%; }
figure img { max-width: 100%; width: 34em; height: auto; border: 1px solid #eee; }
figure.wide img { width: 68em; }
figcaption { font-size: 0.8em; color: #555; max-width: 34em; }
pre { background: #f6f6f6; padding: 0.6em; font-size: 0.8em; white-space: pre-wrap; }
code { font-size: 0.92em; } .small { font-size: 0.85em; color: #444; }
.scroll { overflow-x: auto; max-width: 100%; } details { margin: 0.5em 0; } summary { cursor: pointer; }
@media print { details > *:not(summary) { display: block; } .scroll { overflow: visible; } }
"""


# ----------------------------------------------------------------------------------------------
# small pieces


def _e(text) -> str:
    return html.escape(str(text), quote=True)


def _cell(value) -> tuple[str, bool]:
    """Text of one cell and whether it is text (left-aligned)."""
    if value is None or (isinstance(value, float) and not np.isfinite(value)) or value is pd.NA:
        return "", False
    if isinstance(value, (bool, np.bool_)):
        return ("true" if value else "false"), True
    if isinstance(value, (int, np.integer)):
        return str(int(value)), False
    if isinstance(value, (float, np.floating)):
        v = float(value)
        return (str(int(v)) if v.is_integer() and abs(v) < 1e15 else f"{v:.{DIGITS}g}"), False
    return str(value), True


def _landed(path: Path) -> Path:
    """Where ``path`` will be once its output set is moved in: without a staging folder (:mod:`fitting.outputs`)."""
    return Path(*[part for part in Path(path).parts if not part.startswith(STAGING_PREFIX)])


def _relpath(target: Path, page_dir: Path) -> str:
    return os.path.relpath(_landed(target), _landed(page_dir))


def _href(target: Path, page_dir: Path) -> str:
    return quote(Path(_relpath(target, page_dir)).as_posix())


def html_table(frame: pd.DataFrame, source: Path | None, page_dir: Path, flag_column: str = "flags") -> str:
    """A table with every cell of ``frame``; rows with flags are highlighted.

    ``source`` is the CSV file the rows come from; its path relative to the
    page goes into ``data-csv`` so that readers (and tests) can find it.
    """
    attr = f' data-csv="{_e(_href(source, page_dir))}"' if source is not None else ""
    head = "".join(f'<th class="text">{_e(c)}</th>' if frame[c].dtype == object else f"<th>{_e(c)}</th>"
                   for c in frame.columns)
    rows = []
    for rec in frame.itertuples(index=False):
        cells = []
        for value in rec:
            text, is_text = _cell(value)
            cells.append(f'<td class="text">{_e(text)}</td>' if is_text else f"<td>{_e(text)}</td>")
        flagged = flag_column in frame.columns and _cell(getattr(rec, flag_column, ""))[0].strip()
        rows.append(f'<tr class="flagged">{"".join(cells)}</tr>' if flagged else f"<tr>{''.join(cells)}</tr>")
    return (f'<div class="scroll"><table{attr}><thead><tr>{head}</tr></thead>'
            f'<tbody>{"".join(rows)}</tbody></table></div>')


def _read(path: Path) -> pd.DataFrame | None:
    if not path.is_file():
        return None
    try:
        frame = pd.read_csv(path, dtype={"observer": str, "condition": str, "flags": str, "lag": object})
    except (pd.errors.EmptyDataError, pd.errors.ParserError):
        return None
    for col in frame.columns:
        if frame[col].dtype == object and col not in ("observer", "condition", "flags", "term"):
            numbers = pd.to_numeric(frame[col], errors="coerce")
            if numbers.notna().sum() == frame[col].notna().sum():
                frame[col] = numbers
    return frame


def _figure(path: Path, page_dir: Path, wide: bool = False) -> str:
    prefix = path.stem.split("_", 1)[0]
    caption = FIGURE_CAPTIONS.get(prefix, path.stem)
    pdf = path.with_suffix(".pdf")
    target, hint = (pdf, "click for the PDF") if pdf.is_file() else (path, "click for full size")
    return (f'<figure class="{"wide" if wide else ""}"><a href="{_href(target, page_dir)}">'
            f'<img src="{_href(path, page_dir)}" alt="{_e(caption)}"></a>'
            f"<figcaption>{_e(caption)} — <code>{_e(path.name)}</code> ({hint})</figcaption></figure>")


def _figures_of(fit_dir: Path, tag: str) -> list[Path]:
    found = [p for folder in (fit_dir, fit_dir / "figures") if folder.is_dir()
             for p in sorted(folder.glob(f"*_{tag}.png")) if p.stem.split("_", 1)[1] == tag]   # not x_{tag}'s
    order = list(FIGURE_CAPTIONS)
    return sorted(found, key=lambda p: (order.index(p.stem.split("_", 1)[0])
                                        if p.stem.split("_", 1)[0] in order else len(order), p.name))


def _safe(name: str) -> str:
    from .figures import safe_name

    return safe_name(name)


def _anchor(name: str) -> str:
    return "obs-" + _safe(name)


# ----------------------------------------------------------------------------------------------
# sections


class _Page:
    """Collects the sections of one page."""

    def __init__(self, fit_dir: Path, page_path: Path):
        self.fit_dir = fit_dir
        self.page_dir = page_path.parent
        self.data = read_report_data(fit_dir)
        self.tables = {name: _read(fit_dir / name) for name, _ in OBSERVER_TABLES}
        for extra in ("exclusions.csv", "mixed_model.csv"):
            self.tables[extra] = _read(fit_dir / extra)
        observers = set()
        for frame in self.tables.values():
            if frame is not None and "observer" in frame.columns:
                observers |= set(frame["observer"].dropna().astype(str))
        self.observers = sorted(observers - {GROUP})
        self.has_group = any(frame is not None and "observer" in frame.columns and (frame["observer"] == GROUP).any()
                             for frame in self.tables.values())

    def table(self, name: str, frame: pd.DataFrame) -> str:
        return html_table(frame, self.fit_dir / name, self.page_dir)

    def rows_of(self, observer: str) -> list[tuple[str, str, pd.DataFrame]]:
        out = []
        for name, heading in OBSERVER_TABLES:
            frame = self.tables.get(name)
            if frame is not None and "observer" in frame.columns:
                mine = frame[frame["observer"].astype(str) == observer]
                if len(mine):
                    out.append((name, heading, mine))
        return out

    # -- flags ---------------------------------------------------------------------------------

    def flagged(self, observer: str | None) -> str:
        """Flagged rows and notes (of one observer, or of everyone when None)."""
        parts = []
        notes = self.data.get("notes", {})
        who = [observer] if observer is not None else sorted(notes)
        # on the everyone page, notes all observers share (the protocol's doing) are said once
        shared = [] if observer is not None else shared_notes(notes, self.observers)
        parts += [f"<li>every observer: {_e(note)}</li>" for note in shared]
        for name in who:
            for note in dict.fromkeys(notes.get(name, [])):  # each note once, in order
                if name == GROUP or note not in shared:
                    parts.append(f"<li>{_e(name) + ': ' if observer is None else ''}{_e(note)}</li>")
        tables = []
        for name, heading in OBSERVER_TABLES:
            frame = self.tables.get(name)
            if frame is None or "flags" not in frame.columns:
                continue
            hit = frame[frame["flags"].fillna("").astype(str).str.strip() != ""]
            if observer is not None:
                hit = hit[hit["observer"].astype(str) == observer]
            if len(hit):
                tables.append(f"<h4>{_e(heading)} <code>{_e(name)}</code></h4>" + self.table(name, hit))
        if not parts and not tables:
            return '<p class="ok">No estimate is flagged and there are no notes.</p>'
        notes_html = f"<ul>{''.join(parts)}</ul>" if parts else ""
        return f'<div class="flags"><p><b>Look at these first.</b></p>{notes_html}{"".join(tables)}</div>'

    # -- provenance ----------------------------------------------------------------------------

    def sessions_table(self, observer: str | None) -> str:
        rows = [s for s in self.data.get("sessions", []) if observer is None or s.get("observer") == observer
                or (s.get("observer") is None and Path(s["log"]).name.startswith(observer + "-"))]
        if not rows:
            return "<p>No session records (fitted from logs without a report record).</p>"
        frame = pd.DataFrame([{
            "log": Path(s["log"]).name, "kind": s.get("kind"), "protocol": (s.get("protocol_sha256") or "")[:12],
            "seed": s.get("seed"), "started": s.get("started"), "ended": s.get("ended"),
            "ended by": s.get("ended_by"), "trials": s.get("trials"),
            "measured refresh (Hz)": s.get("measured_refresh_hz"), "dropped frames": s.get("dropped_frames"),
            "note": "; ".join(n for n in (s.get("problem"), s.get("count_problem")) if n),
        } for s in rows])
        frame = frame.astype(object).where(frame.notna(), None)
        return html_table(frame, None, self.page_dir)

    def software_table(self, observer: str | None) -> str:
        rows = []
        if observer is None and self.data.get("software"):
            rows.append({"where": "this fit", **self.data["software"]})
        for s in self.data.get("sessions", []):
            if s.get("packages") and (observer is None or s.get("observer") == observer):
                rows.append({"where": Path(s["log"]).name, **s["packages"]})
        if not rows:
            return "<p>No package versions recorded.</p>"
        frame = pd.DataFrame(rows).astype(object)
        return html_table(frame.where(frame.notna(), None), None, self.page_dir)

    def protocols(self) -> str:
        protos = self.data.get("protocols", {})
        if not protos:
            return "<p>No protocol records: the logs have no sidecars, or the fit predates them.</p>"
        users: dict[str, list[str]] = {}
        for s in self.data.get("sessions", []):
            users.setdefault(s.get("protocol_sha256") or "", []).append(str(s.get("observer")))
        out = []
        if len(protos) > 1:
            out.append('<p class="flags">The observers ran different protocols; compare them before pooling.</p>')
        for sha, p in protos.items():
            who = ", ".join(sorted(set(users.get(sha, []))))
            plan = "\n".join(p.get("plan") or ["(plan not available)"])
            out.append(f'<h3 id="protocol-{_e(sha[:12])}">Protocol <code>{_e(p.get("path"))}</code></h3>'
                       f"<p class=small>SHA-256 <code>{_e(sha)}</code>; observers: {_e(who)}</p>"
                       f"<pre>{_e(plan)}</pre><details><summary>Protocol text</summary>"
                       f"<pre>{_e(p.get('text', ''))}</pre></details>")
        return "".join(out)

    def exclusions(self, observer: str | None) -> str:
        frame = self.tables.get("exclusions.csv")
        if frame is None:
            return "<p>No exclusion counts were written by this fit.</p>"
        if observer is not None:
            frame = frame[frame["observer"].astype(str) == observer]
        return self.table("exclusions.csv", frame)

    # -- whole sections ------------------------------------------------------------------------

    def observer_section(self, observer: str) -> str:
        title = "Group" if observer == GROUP else f"Observer {observer}"
        parts = [f'<h2 id="{_anchor(observer)}">{_e(title)}</h2>', "<h3>Flagged estimates and notes</h3>",
                 self.flagged(observer)]
        if observer == GROUP:
            parts += ["<p>Between-observer summaries: each observer counts once.</p>",
                      "<h3>Protocols used</h3>", self._protocol_links(None),
                      "<h3>Exclusions (all observers)</h3>", self.exclusions(None)]
        else:
            parts += ["<h3>Sessions</h3>", self.sessions_table(observer),
                      "<h3>Protocol</h3>", self._protocol_links(observer),
                      "<h3>Software at the session</h3>", self.software_table(observer),
                      "<h3>Exclusions</h3>", self.exclusions(observer)]
        tables = self.rows_of(observer)
        for name, heading, frame in tables:
            if name not in FOLDED_TABLES:
                parts.append(f"<h3>{_e(heading)} <code class=small>{_e(name)}</code></h3>" + self.table(name, frame))
        if observer == GROUP and self.tables.get("mixed_model.csv") is not None:
            parts.append("<h3>Mixed model <code class=small>mixed_model.csv</code></h3>"
                         + self.table("mixed_model.csv", self.tables["mixed_model.csv"]))
        figures = _figures_of(self.fit_dir, _safe(observer))
        if figures:
            parts.append("<h3>Figures</h3>" + "".join(_figure(f, self.page_dir) for f in figures))
        for name, heading, frame in tables:
            if name in FOLDED_TABLES:
                parts.append(f"<details><summary>{_e(heading)} <code>{_e(name)}</code>, {len(frame)} rows</summary>"
                             + self.table(name, frame) + "</details>")
        return "\n".join(parts)

    def _protocol_links(self, observer: str | None) -> str:
        shas = sorted({s.get("protocol_sha256") for s in self.data.get("sessions", [])
                       if s.get("protocol_sha256") and (observer is None or s.get("observer") == observer)})
        if not shas:
            return "<p>Unknown (no sidecar).</p>"
        protos = self.data.get("protocols", {})
        return "<ul>" + "".join(
            f'<li><a href="#protocol-{_e(sha[:12])}"><code>{_e(protos.get(sha, {}).get("path"))}</code></a>, '
            f"SHA-256 <code>{_e(sha)}</code></li>" for sha in shas) + "</ul>"


def comparison_section(compare_dir: Path, page_dir: Path) -> str:
    """The ``compare`` results: agreement table, overlay figure, matched points."""
    agreement = _read(compare_dir / "agreement.csv")
    points = _read(compare_dir / "comparison_points.csv")
    parts = ['<h2 id="comparison">Comparison with predictions</h2>']
    source = (compare_dir / "predictions_source.txt")
    if source.is_file():
        parts.append(f"<p>Predictions: <code>{_e(source.read_text(encoding='utf-8').strip())}</code></p>")
    if agreement is not None:
        from .compare import CHI2_CAVEAT  # here: compare imports this module

        parts.append("<h3>Agreement per observer and lag <code class=small>agreement.csv</code></h3>"
                     + html_table(agreement, compare_dir / "agreement.csv", page_dir)
                     + f'<p class="flags">Note: {_e(CHI2_CAVEAT)}.</p>')
    png = compare_dir / "comparison.png"
    if png.is_file():
        parts.append(_figure(png, page_dir, wide=True))
    if points is not None:
        parts.append("<details><summary>Every matched point <code>comparison_points.csv</code></summary>"
                     + html_table(points, compare_dir / "comparison_points.csv", page_dir) + "</details>")
    return "\n".join(parts)


def _files_section(folders: list[Path], page_dir: Path) -> str:
    items = []
    for folder in folders:
        for p in sorted(folder.rglob("*")):
            if p.is_file() and not p.name.startswith("."):
                items.append(f'<li><a href="{_href(p, page_dir)}"><code>{_e(_relpath(p, page_dir))}</code></a></li>')
    return '<h2 id="files">Files</h2><ul class="small">' + "".join(items) + "</ul>"


def render(fit_dir, page_path=None, compare_dir=None, title: str | None = None, fit_name: str | None = None,
           notes=()) -> str:
    """The HTML of the report of ``fit_dir`` (and of ``compare_dir``, if given).

    Parameters
    ----------
    fit_dir : path
        A folder written by ``aftershift fit``.
    page_path : path, optional
        Where the page will be written (links are relative to it); default
        ``fit_dir/report.html``.
    compare_dir : path, optional
        A folder written by ``aftershift compare`` on ``fit_dir``.
    title : str, optional
        Heading; by default from the protocol(s).
    fit_name : str, optional
        The name of the folder the fit was written into, when ``fit_dir`` is
        ``compare``'s copy of it (:mod:`fitting.fit_copy`).
    notes : sequence of str
        Shown at the top (files of the fit the page leaves out, and why).
    """
    fit_dir = Path(fit_dir).resolve()
    page_path = Path(page_path).resolve() if page_path is not None else fit_dir / PAGE
    page = _Page(fit_dir, page_path)
    data = page.data
    protos = data.get("protocols", {})
    if title is None:
        titles = sorted({_protocol_title(p.get("text", "")) for p in protos.values()} - {""})
        title = "; ".join(titles) if titles else "fitted trial logs"
    n_obs = len(page.observers)
    nav = ['<li><a href="#flags">Flagged estimates and notes</a></li>', '<li><a href="#protocols">Protocols and plans</a></li>']
    if page.has_group:
        nav.append(f'<li><a href="#{_anchor(GROUP)}">Group</a></li>')
    nav += [f'<li><a href="#{_anchor(o)}">Observer {_e(o)}</a></li>' for o in page.observers]
    if compare_dir is not None:
        nav.append('<li><a href="#comparison">Comparison with predictions</a></li>')
    nav += ['<li><a href="#software">Software</a></li>', '<li><a href="#files">Files</a></li>']
    summary = fit_dir / "summary.txt"
    where = f"fitted into the folder <code>{_e(_landed(fit_dir).name)}</code>."
    if fit_name is not None:
        where = (f"fitted into the folder <code>{_e(fit_name)}</code>; this page shows the copy of that fit "
                 f"taken when it was compared (<code>{_e(_relpath(fit_dir, page_path.parent))}/</code>), so a "
                 "later fit into that folder does not change it.")
    body = [
        f"<h1>aftershift report: {_e(title)}</h1>",
        f"<p>{n_obs} observer{'s' if n_obs != 1 else ''}, {_e(data.get('kind', 'adapt-test'))} logs, "
        f"{where} {_e(data.get('options', ''))}</p>",
        f"<nav><ul>{''.join(nav)}</ul></nav>",
        '<h2 id="flags">Flagged estimates and notes</h2>', page.flagged(None),
        '<h2 id="protocols">Protocols and plans</h2>', page.protocols(),
    ]
    if notes:
        body.insert(2, '<div class="flags"><p><b>Left out of this report:</b></p><ul>'
                       + "".join(f"<li>{_e(n)}</li>" for n in notes) + "</ul></div>")
    if data.get("missing"):
        body.insert(2, f'<p class="flags">{_e(Path(data["missing"]).name)} is missing: sessions, protocols and software '
                       "are unknown to this report.</p>")
    if page.has_group:
        body.append(page.observer_section(GROUP))
    body += [page.observer_section(o) for o in page.observers]
    folders = [fit_dir]
    if compare_dir is not None:
        body.append(comparison_section(Path(compare_dir).resolve(), page_path.parent))
        folders = [Path(compare_dir).resolve()] + ([] if Path(compare_dir).resolve() in fit_dir.parents
                                                    else [fit_dir])
    body += ['<h2 id="software">Software</h2>', "<p>At the fit and at every session (from its sidecar).</p>",
             page.software_table(None)]
    if summary.is_file():
        body.append("<details><summary>The fit's text summary <code>summary.txt</code></summary>"
                    f"<pre>{_e(summary.read_text(encoding='utf-8'))}</pre></details>")
    body.append(_files_section(folders, page_path.parent))
    return (f'<!doctype html>\n<html lang="en"><head><meta charset="utf-8">'
            f'<meta name="viewport" content="width=device-width, initial-scale=1">'
            f"<title>aftershift report: {_e(title)}</title><style>{_STYLE}</style></head><body>\n"
            + "\n".join(body) + "\n</body></html>\n")


def _protocol_title(text: str) -> str:
    for line in text.splitlines():
        stripped = line.strip()
        if stripped.startswith("title") and "=" in stripped:
            value = stripped.split("=", 1)[1].strip()
            if value[:1] in "\"'" and value[-1:] == value[:1]:
                return value[1:-1]
    return ""


def write_page(fit_dir, page_path=None, compare_dir=None, title: str | None = None, fit_name: str | None = None,
               notes=()) -> Path:
    """Write :func:`render`'s page (atomically) and return its path."""
    fit_dir = Path(fit_dir)
    page_path = Path(page_path) if page_path is not None else fit_dir / PAGE
    write_text(page_path, render(fit_dir, page_path, compare_dir, title, fit_name, notes))
    return page_path

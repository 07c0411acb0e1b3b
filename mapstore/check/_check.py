"""Consistency checks over an opened store: grids, space, coverage, stat types, metadata.

Each check returns findings (level, code, subject, message, remedy), in the manner of
a battery of header checks: the caller decides at which level to fail.  A report can
also be written as one HTML page with pictures (coverage across the maps, per study).
"""

from __future__ import annotations

import base64
import html
import json
import time
import warnings
from collections import Counter, defaultdict
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pyarrow as pa

from ..store import check_output, write_file_atomic
from ..errors import OutputPlaceError
from .._version import __version__
from ..analyses import combine
from ..features import pair_correlation
from .._params import AGREEMENT, CHECK_COVERAGE, declared
from ..formats import html_table
from ..statkinds import STAT_KINDS, known_stats
from ._figures import FIGURE_CSS, Scale, compose, figure_html, histograms_html, matrix_html, png_bytes, stack_rgb

__all__ = ["Finding", "CheckReport", "check_store", "png_bytes", "report_json", "LEVELS"]

LEVELS = ("info", "warning", "error")
CONCEPT_AGREEMENT = 0.2  # mean cross-study r of a concept's study means below which check flags it
# the stat labels of the table of statistic kinds, and the nifti1.h intent codes that declare one
KNOWN_STATS = set(known_stats())
INTENT_STATS = {code: {k.label for k in STAT_KINDS if code in k.intents}
                for code in sorted({c for k in STAT_KINDS for c in k.intents if c != 2001})}


@dataclass(frozen=True)
class Finding:
    level: str
    check: str
    code: str
    subject: str
    message: str
    remedy: str = ""


@dataclass
class CheckReport:
    """Findings of :func:`check_store`, plus summary tables and pictures for the HTML page."""

    store: str
    feature_set: str | None
    findings: list[Finding] = field(default_factory=list)
    tables: dict[str, pa.Table] = field(default_factory=dict)  # by stable id (``grids``, ``copies``, ...)
    pictures: dict[str, bytes] = field(default_factory=dict)  # PNG bytes by stable id (``coverage``, ...)
    titles: dict[str, str] = field(default_factory=dict)  # what a person reads above a table or picture
    figures: dict[str, str] = field(default_factory=dict)  # the page's HTML of a picture (labels, colour bar)
    sources: list[str] = field(default_factory=list, repr=False)  # dataset roots: no report is written there
    files: dict[str, str] = field(default_factory=dict)  # a finding's subject that is a map id -> its file
    _order: list[str] = field(default_factory=list, repr=False)  # pictures and figures, as added

    def __repr__(self) -> str:
        return (f"CheckReport({self.store!r}, feature set {self.feature_set!r}: {self.count('error')} error(s), "
                f"{self.count('warning')} warning(s), {self.count('info')} note(s); tables: "
                f"{', '.join(self.tables) or 'none'})")

    def _repr_html_(self) -> str:
        from ..formats import html_table

        order = {"error": 0, "warning": 1, "info": 2}
        rows = sorted(self.findings, key=lambda f: (order.get(f.level, 3), f.check, f.code))
        return html_table(repr(self), ["level", "check", "code", "about", "message", "remedy"],
                          [[f.level, f.check, f.code, f.subject, f.message, f.remedy] for f in rows])

    def add_table(self, key: str, title: str, table: pa.Table) -> None:
        self.tables[key], self.titles[key] = table, title

    def add_picture(self, key: str, title: str, png: bytes, figure: str | None = None) -> None:
        """A picture (PNG bytes), shown on the page as ``figure`` (HTML: panels labelled, a colour bar)
        when given."""
        self.pictures[key], self.titles[key] = png, title
        if figure is not None:
            self.figures[key] = figure
        self._order.append(key)

    def add_figure(self, key: str, title: str, figure: str) -> None:
        """A figure that is HTML only (histograms as SVG, a matrix as a coloured table)."""
        self.figures[key], self.titles[key] = figure, title
        self._order.append(key)

    def count(self, level: str) -> int:
        return sum(1 for f in self.findings if f.level == level)

    def worst(self) -> str | None:
        present = {f.level for f in self.findings}
        for level in reversed(LEVELS):
            if level in present:
                return level
        return None

    def fails(self, level: str) -> bool:
        """True if any finding is at ``level`` or worse."""
        return any(LEVELS.index(f.level) >= LEVELS.index(level) for f in self.findings)

    def to_table(self) -> pa.Table:
        rows = [f.__dict__ for f in sorted(self.findings, key=lambda f: (-LEVELS.index(f.level), f.check,
                                                                          f.code, f.subject))]
        return pa.Table.from_pylist(rows, schema=pa.schema([(k, pa.string()) for k in
                                                           ("level", "check", "code", "subject", "message",
                                                            "remedy")]))

    def summary(self) -> str:
        c = Counter(f.level for f in self.findings)
        by = Counter((f.level, f.check, f.code) for f in self.findings)
        lines = [f"checked {self.store}" + (f" (feature set {self.feature_set!r})" if self.feature_set else ""),
                 f"{c['error']} error(s), {c['warning']} warning(s), {c['info']} note(s)"]
        for (level, check, code), n in sorted(by.items(), key=lambda kv: (-LEVELS.index(kv[0][0]), kv[0])):
            example = next(f for f in self.findings if (f.level, f.check, f.code) == (level, check, code))
            lines.append(f"  {level:7s} {check:9s} {code:26s} x{n:<4d} e.g. {example.message}")
        return "\n".join(lines)

    def write_html(self, path: str | Path, command: str | None = None) -> Path:
        """One self-contained HTML page, read top to bottom: what was checked (version, time, command), the
        counts and the studies, then the findings (each with an anchor, files linked), then the tables,
        then the pictures (embedded)."""
        path = check_output(path, sources=self.sources, stores=[self.store], folder=False, what="--html")
        esc = html.escape
        parts = ["<!doctype html><html><head><meta charset='utf-8'><title>mapstore check</title>",
                 "<style>body{font-family:sans-serif;margin:1.5em auto;max-width:1400px;padding:0 1em}"
                 "table{border-collapse:collapse;margin-bottom:1em}td,th{border:1px solid #ccc;padding:2px 6px;"
                 "font-size:90%;text-align:left;vertical-align:top}.error{background:#fdd}.warning{background:#ffd}"
                 ".info{background:#eef}img{image-rendering:pixelated;border:1px solid #999;margin:4px;"
                 "max-width:100%}header p{color:#444;margin:.2em 0}" + FIGURE_CSS + "</style></head><body>",
                 "<header><h1>mapstore check</h1>"
                 f"<p>store <code>{esc(self.store)}</code>"
                 + (f", feature set <code>{esc(self.feature_set)}</code>" if self.feature_set else "") + "</p>"
                 f"<p>mapstore {esc(__version__)}, {esc(time.strftime('%Y-%m-%d %H:%M:%S'))}"
                 + (f", <code>{esc(command)}</code>" if command else "") + "</p></header>",
                 f"<p id='counts'><b>{_plural(self.count('error'), 'error')}, {_plural(self.count('warning'), 'warning')}, "
                 f"{_plural(self.count('info'), 'note')}</b></p>"]
        if "studies" in self.tables:
            parts.append(f"<h2 id='studies'>{esc(self.titles.get('studies', 'studies'))}</h2>"
                         + _html_table(self.tables["studies"]))
        parts.append("<h2 id='findings'>findings</h2>" + _findings_table(self.to_table(), self.files))
        for key, table in self.tables.items():
            if key != "studies":
                parts.append(f"<h2 id='{esc(key)}'>{esc(self.titles.get(key, key))}</h2>" + _html_table(table))
        for key in dict.fromkeys(self._order + list(self.pictures) + list(self.figures)):
            title = esc(self.titles.get(key, key))
            if key in self.figures:
                parts.append(f"<section class='figure'><h2 id='{esc(key)}'>{title}</h2>{self.figures[key]}</section>")
            else:
                b64 = base64.b64encode(self.pictures[key]).decode()
                parts.append(f"<h2 id='{esc(key)}'>{title}</h2><img alt='{title}' src='data:image/png;base64,{b64}'>")
        # layout facts a browser can report back (the report's own test reads them): broken pictures, and
        # where the findings and the first picture sit on the page
        parts.append("<script>window.addEventListener('load',function(){var im=document.images,b=0;"
                     "for(var i=0;i<im.length;i++){if(!im[i].complete||im[i].naturalWidth===0)b++;}"
                     "var d=document.body.dataset;d.brokenImages=b;d.findingsTop="
                     "Math.round(document.getElementById('findings').getBoundingClientRect().top);"
                     "d.firstPictureTop=im.length?Math.round(im[0].getBoundingClientRect().top):-1;"
                     "d.pageWidth=document.documentElement.scrollWidth;"
                     # the smallest label on a picture, panels whose edge marks sit above and below them, and
                     # concept figures whose summary table stands beside the matrix
                     "var px=1e9;document.querySelectorAll('.axis span,.ticks span,.mark').forEach(function(e){"
                     "px=Math.min(px,parseFloat(getComputedStyle(e).fontSize));});d.smallestLabelPx=Math.round(px);"
                     "var n=0,ok=0;document.querySelectorAll('.column').forEach(function(c){var t=c.querySelector("
                     "'.mark.top'),b=c.querySelector('.mark.bottom'),i=c.querySelector('img');if(!t||!b||!i)return;"
                     "n++;var r=i.getBoundingClientRect();if(t.getBoundingClientRect().bottom<=r.top+1&&"
                     "b.getBoundingClientRect().top>=r.bottom-1)ok++;});d.markedPanels=n;d.marksAround=ok;"
                     "var m=0,s=0;document.querySelectorAll('.beside').forEach(function(x){m++;var a=x.children[0]"
                     ".getBoundingClientRect(),c=x.children[1].getBoundingClientRect();if(c.left>=a.right&&"
                     "Math.abs(c.top-a.top)<60)s++;});d.besides=m;d.besideOk=s;});</script>")
        parts.append("</body></html>")
        if not path.parent.is_dir():
            raise OutputPlaceError(f"{path}: --html names a file in a folder that does not exist; create "
                                   f"{path.parent} first or choose another place")
        write_file_atomic(path, "\n".join(parts).encode("utf-8"))
        return path


def _plural(n: int, word: str) -> str:
    return f"{n} {word}" if n == 1 else f"{n} {word}s"


def _findings_table(table: pa.Table, files: dict[str, str] | None = None) -> str:
    """The findings, each row an anchor (#finding-N); a subject that is a file, or a map id whose file is
    known (``files``), becomes a link to the file."""
    import os
    from pathlib import Path

    files = files or {}
    head = "".join(f"<th>{html.escape(c)}</th>" for c in table.column_names)
    rows = []
    for i, r in enumerate(table.to_pylist(), 1):
        cells = []
        for k, v in r.items():
            text = html.escape("" if v is None else str(v))
            target = files.get(str(v)) if k == "subject" and v else None
            if target is None and k == "subject" and v and os.path.isabs(str(v)):
                target = str(v)
            if target is not None and os.path.exists(target):
                text = f"<a href='{html.escape(Path(target).as_uri())}'>{text}</a>"
            cells.append(f"<td>{text}</td>")
        rows.append(f"<tr id='finding-{i}' class='{html.escape(str(r['level']))}'>{''.join(cells)}</tr>")
    return f"<table><tr>{head}</tr>{''.join(rows)}</table>"


def _html_table(table: pa.Table, level_col: str | None = None) -> str:
    head = "".join(f"<th>{html.escape(c)}</th>" for c in table.column_names)
    rows = []
    for r in table.to_pylist():
        cls = f" class='{r[level_col]}'" if level_col else ""
        cells = "".join(f"<td>{html.escape('' if v is None else str(v))}</td>" for v in r.values())
        rows.append(f"<tr{cls}>{cells}</tr>")
    return f"<table><tr>{head}</tr>{''.join(rows)}</table>"


# --- checks -------------------------------------------------------------------------------

@declared(min_coverage=CHECK_COVERAGE, min_agreement=AGREEMENT)
def check_store(store, features: str | None = None, *, min_coverage: float = 0.8,
                pictures: bool = True, max_rows_for_pictures: int = 400,
                min_agreement: float = CONCEPT_AGREEMENT) -> CheckReport:
    """Run every check on a :class:`mapstore.Store`.

    Parameters
    ----------
    store : mapstore.Store
    features : str, optional
        Feature set for coverage and value checks (default: the default set, if any).
    min_coverage : float, default=0.8
        Maps covering less of the mask than this are reported.
    min_agreement : float, default=0.2
        Concepts whose per-study mean maps correlate less than this across studies (on
        average) are flagged: a decoder trained across studies can only work where the
        studies agree.
    pictures : bool, default=True
        Make the coverage pictures (reads up to ``max_rows_for_pictures`` rows, spread
        over the set).
    """
    store.catalog.require_catalog()
    fs = None
    if store.feature_sets():
        fs = store.features(features)
    report = CheckReport(str(store.path), fs.name if fs else None,
                         sources=store.sql("SELECT root FROM datasets")["root"].to_pylist())
    add = report.findings.append
    _study_table(store, fs, report)
    _check_problems(store, add)
    # catalog-wide checks are SQL aggregates: the maps table is never read into Python whole
    _check_grids(store, add, report)
    _check_space(store, add)
    _check_surfaces(store, add, report)
    _check_stats(store, add)
    _check_metadata(store, add)
    if fs is not None:
        # the few columns the feature checks need, of the set's maps only
        maps = store.sql(f"SELECT {', '.join('m.' + c for c in _SET_COLUMNS)} FROM maps m JOIN features f "
                         f"USING (map_id) WHERE f.feature_set = {_lit(fs.name)}").to_pylist()
        _check_features(store, fs, maps, min_coverage, add, report, pictures, max_rows_for_pictures)
        _check_target(store, fs, add)
        _check_copies(fs, maps, add, report)
        _check_concepts(store, fs, maps, add, report, pictures, min_agreement)
    _link_files(store, report)
    return report


def _link_files(store, report: CheckReport) -> None:
    """The file of each finding whose subject is a map id (so the page links it)."""
    ids = sorted({f.subject for f in report.findings if len(f.subject) == 16 and
                  all(c in "0123456789abcdef" for c in f.subject)})
    if not ids:
        return
    import os

    for r in store.sql("SELECT m.map_id, d.root, m.relpath FROM maps m JOIN datasets d USING (dataset) WHERE "
                       f"m.map_id IN ({', '.join(_lit(i) for i in ids)})").to_pylist():
        report.files[r["map_id"]] = os.path.join(r["root"], r["relpath"])


def _study_table(store, fs, report) -> None:
    """One row per study: its datasets, subjects, tasks, stats, spaces, DOF range, maps, and (with a feature set)
    the mean coverage of its rows."""
    cover = ""
    if fs is not None:
        cover = (", round(avg(f.coverage), 3) AS mean_coverage FROM maps m LEFT JOIN features f ON "
                 f"f.map_id = m.map_id AND f.feature_set = {_lit(fs.name)}")
    else:
        cover = " FROM maps m"
    rows = store.sql("SELECT m.study, count(DISTINCT m.dataset) AS datasets, count(DISTINCT m.participant) AS "
                     "subjects, string_agg(DISTINCT m.task, ', ' ORDER BY m.task) AS tasks, "
                     "string_agg(DISTINCT m.stat, ', ' ORDER BY m.stat) AS stats, "
                     "string_agg(DISTINCT m.space, ', ' ORDER BY m.space) AS spaces, "
                     "min(m.dof) AS dof_min, max(m.dof) AS dof_max, count(*) AS maps" + cover +
                     " GROUP BY m.study ORDER BY m.study")
    if fs is not None:
        rows = _explain_absent(store, fs, rows)
    report.add_table("studies", "the studies (one row each)", rows)


def _explain_absent(store, fs, rows: pa.Table) -> pa.Table:
    """A ``note`` column saying why a study has no row in the checked set (blank coverage, no pictures):
    the sets that hold its maps instead, or why its maps failed."""
    notes = []
    for r in rows.to_pylist():
        if r.get("mean_coverage") is not None:
            notes.append("")
            continue
        study = _lit(r["study"])
        other = [x["feature_set"] for x in store.sql(
            "SELECT DISTINCT f.feature_set FROM features f JOIN maps m USING (map_id) WHERE m.study = " + study +
            " ORDER BY 1").to_pylist()]
        failed = store.sql("SELECT p.reason, count(*) AS n FROM feature_problems p JOIN maps m USING (map_id) "
                           f"WHERE m.study = {study} AND p.feature_set = {_lit(fs.name)} GROUP BY ALL "
                           "ORDER BY n DESC LIMIT 1").to_pylist()
        note = f"no map in set {fs.name!r}"
        if failed:
            note += f" ({failed[0]['n']} failed: {failed[0]['reason']})"
        if other:
            note += "; its maps are in " + ", ".join(repr(o) for o in other) + " (check that set with --features)"
        notes.append(note)
    return rows.append_column("note", pa.array(notes, pa.string())) if any(notes) else rows


_SET_COLUMNS = ("map_id", "dataset", "relpath", "study", "participant", "entities", "stat")


def _lit(text: str) -> str:
    return "'" + str(text).replace("'", "''") + "'"


def _check_problems(store, add) -> None:
    # image files no naming took: one finding per dataset and name ending, whatever the crawl's units
    for p in store.sql("SELECT dataset, regexp_extract(reason, '\\(\\*([^)]*)\\)', 1) AS ending, sum(count) AS n, "
                       "min(path) AS example, any_value(remedy) AS remedy FROM problems WHERE code = 'unmatched-images' "
                       "GROUP BY ALL ORDER BY dataset, ending").to_pylist():
        add(Finding("info", "files", "unmatched-images", p["dataset"] or "?",
                    f"{p['n']} image file(s) *{p['ending']} were passed over: no BIDS statmap name, no name rule "
                    f"(e.g. {p['example']})", p["remedy"]))
    for p in store.sql("SELECT * FROM problems WHERE code <> 'unmatched-images'").to_pylist():
        add(Finding(p["level"] if p["level"] in LEVELS else "error", "files", p["code"], p["path"],
                    p["reason"], p["remedy"]))


def _check_grids(store, add, report) -> None:
    grids = store.sql("SELECT grid_id, any_value(shape) AS shape, any_value(voxel_size) AS voxel_size, "
                      "any_value(orientation) AS orientation, any_value(affine) AS affine, count(*) AS n, "
                      f"list(DISTINCT dataset ORDER BY dataset) AS datasets FROM maps WHERE {_VOLUME} GROUP BY grid_id "
                      "ORDER BY n DESC, grid_id").to_pylist()
    rows = []
    for g in grids:
        gid, n = g["grid_id"], g["n"]
        rows.append({"grid_id": gid, "shape": "x".join(map(str, g["shape"][:3])),
                     "voxel_mm": "x".join(f"{v:g}" for v in np.round(g["voxel_size"], 3)),
                     "orientation": g["orientation"], "maps": n, "datasets": ", ".join(g["datasets"])})
        aff = np.reshape(g["affine"], (4, 4))[:3, :3]
        if (np.abs(aff) > 1e-6).sum() > 3:
            add(Finding("info", "grid", "oblique-grid", gid, f"{n} map(s) on an oblique grid "
                        f"({rows[-1]['shape']}); they take the general (slower) interpolation path"))
        vs = np.asarray(g["voxel_size"])
        if vs.max() / vs.min() > 1.01:
            add(Finding("info", "grid", "anisotropic-voxels", gid,
                        f"{n} map(s) with voxels {rows[-1]['voxel_mm']} mm"))
    report.add_table("grids", "grids", pa.Table.from_pylist(rows))
    mixed = store.sql("SELECT dataset, list(struct_pack(g := grid_id, n := n) ORDER BY n DESC, grid_id) AS grids "
                      f"FROM (SELECT dataset, grid_id, count(*) AS n FROM maps WHERE {_VOLUME} GROUP BY ALL) GROUP BY dataset "
                      "HAVING count(*) > 1 ORDER BY dataset").to_pylist()
    for r in mixed:
        ds = r["dataset"]
        listed = ", ".join(f"{x['g']} x{x['n']}" for x in r["grids"])
        add(Finding("warning", "grid", "mixed-grids", ds,
                    f"dataset {ds} mixes {len(r['grids'])} grids ({listed})",
                    "fine for mapstore (every map is resampled), but check the models were fit alike"))
    multi = store.sql("SELECT dataset, list(stat ORDER BY relpath) AS stats, min(relpath) AS example, "
                      "arg_min(n_volumes, relpath) AS example_volumes, count(*) AS n FROM maps "
                      "WHERE n_volumes > 1 AND map_index IS NULL GROUP BY dataset ORDER BY dataset").to_pylist()
    for r in multi:
        kinds = Counter(f"stat-{s}" for s in r["stats"])
        add(Finding("info", "grid", "multi-volume", r["dataset"],
                    f"{r['n']} map(s) hold several volumes ({', '.join(f'{k} x{n}' for k, n in sorted(kinds.items()))}"
                    f"; e.g. {r['example']}, {r['example_volumes']} volumes): an F contrast's effect has one "
                    "volume per contrast row, a residual map one per scan; they are indexed and left out of "
                    "feature sets", "nothing to do; split a file into 3-D maps if you need its volumes"))


_VOLUME = "geometry = 'volume'"


def _check_surfaces(store, add, report) -> None:
    """Surface and grayordinate maps: their meshes, and hemispheres that have no partner."""
    meshes = store.sql(f"SELECT grid_id, geometry, any_value(space) AS space, any_value(den) AS den, "
                       "any_value(hemi) AS hemi, any_value(n_vertices) AS n_vertices, any_value(structures) AS "
                       "structures, count(*) AS maps, string_agg(DISTINCT dataset, ', ' ORDER BY dataset) AS datasets "
                       f"FROM maps WHERE NOT {_VOLUME} GROUP BY grid_id, geometry ORDER BY geometry, space, hemi, "
                       "grid_id").to_pylist()
    if not meshes:
        return
    report.add_table("meshes", "meshes", pa.Table.from_pylist(meshes))
    for r in store.sql("SELECT dataset, hemi, count(*) AS n, min(relpath) AS example FROM maps WHERE geometry = "
                       "'surface' AND linked_map IS NULL GROUP BY dataset, hemi ORDER BY dataset, hemi").to_pylist():
        add(Finding("warning", "surface", "unpaired-hemisphere", r["dataset"],
                    f"{r['n']} hemi-{r['hemi']} map(s) with no file for the other hemisphere (e.g. {r['example']}); "
                    "in a surface set the other hemisphere is missing", "add the other hemisphere's file, named "
                    "like this one but for hemi-L/hemi-R"))
    for r in store.sql("SELECT hemi, count(DISTINCT grid_id) AS g, string_agg(DISTINCT coalesce(space, '?') || ' (' "
                       "|| n_vertices || ' vertices)', ', ') AS meshes FROM maps WHERE geometry = 'surface' GROUP BY "
                       "hemi HAVING count(DISTINCT grid_id) > 1 ORDER BY hemi").to_pylist():
        add(Finding("info", "surface", "several-meshes", f"hemi-{r['hemi']}",
                    f"hemi-{r['hemi']} maps on {r['g']} meshes ({r['meshes']})", "a surface set resamples "
                    "fsaverage densities (nearest vertex on the sphere); other meshes need a mesh of their own"))
    for r in store.sql("SELECT space, count(*) AS n, min(relpath) AS example FROM maps WHERE geometry = 'surface' "
                       "AND ((space IS NULL AND n_vertices NOT IN (642, 2562, 10242, 40962, 163842)) OR NOT starts_with(space, "
                       "'fsaverage')) GROUP BY space").to_pylist():
        native = (r["space"] or "").startswith("fsnative")
        add(Finding("warning", "space", "surface-space", r["space"] or "(none)",
                    f"{r['n']} surface map(s) in space {r['space'] or '(none)'} (e.g. {r['example']}): the built-in "
                    "surface set takes fsaverage meshes",
                    "fsnative maps are on each subject's own mesh: build the set with --subjects-dir (the FreeSurfer "
                    "subjects folder; each subject's surf/?h.sphere.reg takes its maps onto fsaverage)" if native else
                    "build the set on their mesh (--grid MESH.json, a mesh description; 'mapstore mesh' writes one "
                    "from a FreeSurfer folder), or give the target's description a sphere of their space registered "
                    "to it (registered_spheres)"))


_MNI_BRAIN_BOX = (np.array([-78.0, -112.0, -72.0]), np.array([78.0, 76.0, 86.0]))  # mm, common practice


def _check_space(store, add) -> None:
    spaces = {r["space"]: r["n"] for r in store.sql(f"SELECT space, count(*) AS n FROM maps WHERE {_VOLUME} "
                                                     "AND space_kind <> 'native' GROUP BY space").to_pylist()}
    named = {s for s in spaces if s}
    for r in store.sql(f"SELECT dataset, count(*) AS n, min(relpath) AS example, any_value(registration) AS why, "
                       f"count(*) FILTER (WHERE registration NOT LIKE '{{\"missing\"%') AS registered FROM maps "
                       f"WHERE {_VOLUME} AND space_kind = 'native' GROUP BY dataset ORDER BY dataset").to_pylist():
        missing = r["n"] - r["registered"]
        if missing:
            why = json.loads(r["why"]).get("missing", "") if r["why"] else ""
            add(Finding("error", "space", "native-no-registration", r["dataset"],
                        f"{missing} native-space volume map(s) without a registration to a template (e.g. "
                        f"{r['example']}: {why}); feature sets refuse them",
                        "give the folder holding the registrations with 'mapstore index --transforms DIR', or "
                        "index the maps written in template space"))
        if r["registered"]:
            add(Finding("info", "space", "native-registered", r["dataset"],
                        f"{r['registered']} native-space volume map(s) reach the template through their "
                        "registration (one resampling: transform, then the set's interpolation)",
                        "none needed; a changed registration file rebuilds their rows"))
    if len(named) > 1:
        add(Finding("warning", "space", "several-spaces", "catalog",
                    f"volume maps in {len(named)} template spaces ({', '.join(f'{s} x{spaces[s]}' for s in sorted(named))})",
                    "resampling aligns grids, not templates: MNI152 variants differ by a few mm; "
                    "select one space, or accept the small misalignment"))
    if spaces.get(None):
        add(Finding("warning", "space", "no-space-entity", "catalog",
                    f"{spaces[None]} map(s) have no space- entity; they are taken to be in the target's space "
                    "(a map in a subject's own space would land in the wrong place)",
                    "add space-<label> to the file names, or a name rule that sets it"))
    lo_b, hi_b = _MNI_BRAIN_BOX
    grids = store.sql("SELECT grid_id, any_value(affine) AS affine, any_value(shape) AS shape, min(relpath) AS "
                      "example, string_agg(DISTINCT dataset, ', ' ORDER BY dataset) AS datasets, count(*) AS n "
                      f"FROM maps WHERE {_VOLUME} GROUP BY grid_id ORDER BY grid_id").to_pylist()
    for g in grids:
        aff = np.reshape(g["affine"], (4, 4))
        shape = np.asarray(g["shape"][:3])
        corners = np.array([[i, j, k, 1] for i in (0, shape[0] - 1) for j in (0, shape[1] - 1)
                            for k in (0, shape[2] - 1)]) @ aff.T
        lo, hi = corners[:, :3].min(axis=0), corners[:, :3].max(axis=0)
        overlap = np.prod(np.clip(np.minimum(hi, hi_b) - np.maximum(lo, lo_b), 0, None)) / np.prod(hi_b - lo_b)
        n = g["n"]
        if overlap < 0.05:
            add(Finding("error", "space", "outside-mni-brain", g["datasets"] or g["grid_id"],
                        f"{n} map(s) (e.g. {g['example']}) have a field of view that misses the MNI brain "
                        f"box: world x {lo[0]:.0f}..{hi[0]:.0f}, y {lo[1]:.0f}..{hi[1]:.0f}, z {lo[2]:.0f}..{hi[2]:.0f} mm",
                        "the affine is probably wrong or the map is in native space; fix the header"))
        elif overlap < 0.8:
            add(Finding("warning", "space", "partial-field-of-view", g["datasets"] or g["grid_id"],
                        f"{n} map(s) of grid {g['grid_id']} (e.g. {g['example']}) cover {overlap:.0%} of the MNI "
                        f"brain box: world x {lo[0]:.0f}..{hi[0]:.0f}, y {lo[1]:.0f}..{hi[1]:.0f}, "
                        f"z {lo[2]:.0f}..{hi[2]:.0f} mm",
                        "expected for partial acquisitions; set a coverage threshold when exporting"))


def _check_stats(store, add) -> None:
    known = ", ".join(_lit(k) for k in sorted(KNOWN_STATS))
    intents = ", ".join(str(c) for c in INTENT_STATS)
    # only the maps that may be flagged come back from the catalog
    for m in store.sql("SELECT map_id, relpath, stat, intent_code, intent_name, dof FROM maps "
                       f"WHERE stat NOT IN ({known}) OR intent_code IN ({intents}) OR (stat = 't' AND dof IS NULL) "
                       "ORDER BY dataset, relpath").to_pylist():
        stat = m["stat"]
        if stat not in KNOWN_STATS:
            add(Finding("warning", "stat", "unknown-stat", m["map_id"],
                        f"{m['relpath']}: stat-{stat} is not one of {', '.join(sorted(KNOWN_STATS))}",
                        "rename the file, or treat it as an effect map"))
        agree = INTENT_STATS.get(m["intent_code"])
        if agree is not None and stat not in agree:
            add(Finding("warning", "stat", "intent-disagrees", m["map_id"],
                        f"{m['relpath']}: named stat-{stat} but the header intent is {m['intent_name']!r}",
                        "check which statistic the file holds; fix the name or the header"))
        if stat == "t" and m["dof"] is None:
            add(Finding("warning", "stat", "t-without-dof", m["map_id"],
                        f"{m['relpath']}: t map without usable degrees of freedom (none of: sidecar "
                        "DegreesOfFreedom, header intent_p1, a design matrix beside it, a header description "
                        "{T_[df]}, a DOF file)",
                        "add DegreesOfFreedom to the sidecar to allow t-to-z conversion"))


def _check_metadata(store, add) -> None:
    for r in store.sql("SELECT m.dataset, list(DISTINCT m.sub ORDER BY m.sub) AS subs FROM maps m "
                       "WHERE m.sub IS NOT NULL AND m.dataset IN (SELECT dataset FROM participants) "
                       "AND NOT EXISTS (SELECT 1 FROM participants p WHERE p.dataset = m.dataset AND p.sub = m.sub) "
                       "GROUP BY m.dataset ORDER BY m.dataset").to_pylist():
        subs = r["subs"]
        add(Finding("warning", "metadata", "subject-not-in-participants", r["dataset"],
                    f"{len(subs)} subject(s) with maps are missing from participants.tsv (e.g. sub-{subs[0]})",
                    "add them to participants.tsv"))
    for field_, code in (("site", "no-site"), ("lab", "no-lab")):
        for r in store.sql(f"SELECT dataset, count(*) AS k FROM maps WHERE {field_} IS NULL GROUP BY dataset "
                           "ORDER BY dataset").to_pylist():
            ds, k = r["dataset"], r["k"]
            add(Finding("info", "metadata", code, ds, f"{k} map(s) of {ds} have no {field_}",
                        f"set it with an origins file (mapstore index --origins) to group by {field_}"))
    for r in store.sql("SELECT dataset, task, list(DISTINCT dof ORDER BY dof) AS vals FROM maps "
                       "WHERE stat = 't' AND dof IS NOT NULL GROUP BY dataset, task "
                       "HAVING count(DISTINCT dof) > 1 ORDER BY dataset, task").to_pylist():
        ds, task, vals = r["dataset"], r["task"], r["vals"]
        add(Finding("info", "metadata", "dof-varies", f"{ds}/{task}",
                    f"t maps of task {task} have {len(vals)} different DOF ({', '.join(f'{v:g}' for v in vals)})",
                    "expected when subjects lost runs; check if not"))
    # the two hemisphere files of one map count once: constant halves (an intercept-only model's R
    # squared) are byte-identical without being a copy
    for r in store.sql("SELECT sha256, count(DISTINCT CASE WHEN linked_map IS NOT NULL THEN least(map_id, linked_map) "
                       "ELSE map_id END) AS n, list(dataset || ':' || relpath ORDER BY dataset, relpath) "
                       "AS places FROM maps GROUP BY sha256, map_index HAVING n > 1 ORDER BY sha256").to_pylist():
        where = ", ".join(r["places"][:3])
        add(Finding("warning", "provenance", "duplicate-file", r["sha256"][:16],
                    f"{r['n']} maps are byte-identical ({where})",
                    "a map copied between studies leaks in splits; the export refuses such splits"))


_MAPS_PER_STUDY = 200  # rows read per study and concept for the means


def _standardised(x: np.ndarray) -> np.ndarray:
    """Rows centred and scaled over their finite voxels (so t, z and effect maps average alike)."""
    x = x.astype(np.float64)
    mu = np.nanmean(x, axis=1, keepdims=True)
    sd = np.nanstd(x, axis=1, keepdims=True)
    return (x - mu) / np.where(sd > 0, sd, 1.0)


def _check_concepts(store, fs, maps, add, report, pictures: bool, min_agreement: float) -> None:
    """Per concept: each study's mean map, and how well those means agree across studies."""
    if not store.catalog.head.labels:
        return
    in_set = set(fs.map_ids)
    study_of = {m["map_id"]: m["study"] for m in maps}
    by: dict[str, dict[str, list[str]]] = defaultdict(lambda: defaultdict(list))
    for r in store.sql("SELECT map_id, concept FROM labels WHERE direct ORDER BY map_id").to_pylist():
        if r["map_id"] in in_set and r["map_id"] in study_of:
            by[r["concept"]][study_of[r["map_id"]]].append(r["map_id"])
    rows, summary = [], []
    tiles: dict[str, list[tuple[str, np.ndarray]]] = {}
    matrices: dict[str, str] = {}  # each concept's study x study agreement, shown beside its picture
    for concept in sorted(by):
        studies = {s: ids for s, ids in by[concept].items()}
        if len(studies) < 2:
            continue
        means, variances = {}, {}
        for s, ids in sorted(studies.items()):
            pick = ids if len(ids) <= _MAPS_PER_STUDY else \
                [ids[i] for i in np.linspace(0, len(ids) - 1, _MAPS_PER_STUDY).astype(int)]
            with np.errstate(invalid="ignore", divide="ignore"), warnings.catch_warnings():
                warnings.simplefilter("ignore", RuntimeWarning)  # voxels no map of the study covers
                std = _standardised(fs.matrix(pick))
                means[s] = np.nanmean(std, axis=0).astype(np.float32)
                n = np.isfinite(std).sum(axis=0)
                # the variance of the study's mean map: for the pooled map and the heterogeneity across studies
                variances[s] = np.where(n >= 3, np.nanvar(std, axis=0, ddof=1) / np.maximum(n, 1), np.nan)
        names = sorted(means)
        rs = []
        for i, a in enumerate(names):
            for b in names[i + 1:]:
                r, n = pair_correlation(means[a], means[b])
                rs.append(r)
                rows.append({"concept": concept, "study_a": a, "study_b": b, "maps_a": len(studies[a]),
                             "maps_b": len(studies[b]), "r_of_means": round(r, 3), "common_voxels": n})
        finite = [r for r in rs if np.isfinite(r)]
        mean_r = float(np.mean(finite)) if finite else float("nan")
        pooled = combine(effect=np.stack([means[s] for s in names]), variance=np.stack([variances[s] for s in names]),
                         method="random")
        z, i2 = pooled["z"], pooled["i2"]
        zmax = z[np.isfinite(z)]
        # heterogeneity where the studies show the concept: over null voxels I^2 is 0 almost everywhere
        # (Q below its degrees of freedom), so a median over the whole mask says nothing
        strong = np.isfinite(z) & np.isfinite(i2) & (np.abs(np.nan_to_num(z)) >= _STRONG_Z)
        # a study's variance is its maps' spread: with a handful of maps it is too rough to weigh studies
        # by (a study of three maps can look a hundred times surer than it is), so nothing is shown
        weighed = min(len(studies[s]) for s in names) >= _MIN_MAPS_TO_WEIGH
        summary.append({"concept": concept, "studies": len(names), "maps": sum(len(v) for v in studies.values()),
                        "mean_cross_study_r": round(mean_r, 3), "min_r": round(min(finite), 3) if finite else None,
                        "pooled_max_z": round(float(zmax.max()), 2) if zmax.size and weighed else None,
                        "voxels_pooled_z_3": int(strong.sum()) if weighed else None,
                        "median_I2_there": round(float(np.median(i2[strong])), 3)
                        if weighed and strong.sum() >= 10 else None})
        if not finite or mean_r < min_agreement:
            add(Finding("warning", "concepts", "low-concept-agreement", concept,
                        f"concept {concept!r}: the mean maps of its {len(names)} studies correlate at r = {mean_r:.2f} "
                        f"on average (threshold {min_agreement:g}); a decoder trained on some studies is unlikely to "
                        "recognise it in the others",
                        "check the vocabulary's rules for this concept (are the contrasts alike?) and the maps' "
                        "stat types and signs"))
        tiles[concept] = [(s, means[s]) for s in names]
        if pictures:
            r = np.full((len(names), len(names)), np.nan)
            for row in rows:
                if row["concept"] == concept:
                    i, j = names.index(str(row["study_a"])), names.index(str(row["study_b"]))
                    r[i, j] = r[j, i] = row["r_of_means"]
            row = summary[-1]
            # the concept's figures in one place: the matrix, and beside it the concept's agreement figures
            matrices[concept] = (
                "<div class='beside'>" + matrix_html(names, r)
                + html_table(f"concept {concept!r} across its studies", [k for k in row if k != "concept"],
                             [[("-" if v is None else v) for k, v in row.items() if k != "concept"]]) + "</div>")
    if summary:
        report.add_table("concept-agreement", "concept agreement across studies (mean of each study's standardised "
                         f"maps; pooled by random effects: the largest pooled z, the voxels where |z| >= {_STRONG_Z:g}, "
                         "and there the median I^2, the share of the variation that lies between studies; blank "
                         f"when a study has fewer than {_MIN_MAPS_TO_WEIGH} maps of the concept, or with fewer than 10 "
                         "such voxels; 'mapstore pool' weighs studies by their own variance maps)",
                         pa.Table.from_pylist(summary))
        report.add_table("concept-agreement-pairs", "concept agreement, study x study (r of the study means)",
                         pa.Table.from_pylist(rows))
    if pictures and tiles:
        _concept_pictures(fs, tiles, matrices, report)


class _Drawer:
    """Rows of a feature set drawn for the report: its base target's labelled panels (through a focus:
    a volume's peak voxel) over the target's background, dimmed outside the set's mask."""

    _HEIGHT = 300  # pixels a row of panels aims at

    def __init__(self, fs) -> None:
        self.fs, self.base = fs, fs.base()
        self.inside = fs.on_base(np.ones(fs.n_voxels, dtype=np.float32))  # NaN outside the set's mask

    def focus(self, vector: np.ndarray):
        return self.base.peak(self.fs.on_base(vector))

    def draw(self, rows: list[tuple[str, np.ndarray]], scale: Scale, focus=None, note: str = "") -> tuple[bytes, str]:
        """(one PNG of every row, the page's figure) for rows of (name, vector over the set's mask)."""
        backgrounds = self.base.background_panels(focus)
        drawn_rows = self.base.panels_of([self.inside] + [self.fs.on_base(v) for _, v in rows], focus)
        inside = [p.values for p in drawn_rows[0]]
        finite = np.concatenate([b[np.isfinite(b)].ravel() for b in backgrounds]) if backgrounds else np.zeros(1)
        grey = tuple(np.percentile(finite, [2, 99.5])) if finite.size and np.ptp(finite) > 0 else (0.0, 1.0)
        tallest = max(b.shape[0] for b in backgrounds)
        wide = sum(b.shape[1] for b in backgrounds)
        zoom = max(1, min(round(self._HEIGHT / tallest), 1100 // max(wide, 1)))
        drawn, headers = [], []
        for (name, _), panels in zip(rows, drawn_rows[1:]):
            headers = [(p.label, p.left, p.right, p.top, p.bottom) for p in panels]
            drawn.append((name, [compose(p.values, bg, ins, scale, grey, zoom)  # type: ignore[arg-type]
                                 for p, bg, ins in zip(panels, backgrounds, inside)]))
        png = png_bytes(stack_rgb([rgbs for _, rgbs in drawn]))
        return png, figure_html(drawn, headers, scale, note)


def _concept_pictures(fs, tiles: dict[str, list[tuple[str, np.ndarray]]], matrices: dict[str, str], report) -> None:
    """Each study's mean map over the set's background (the MNI152 template; sulcal depth on a surface),
    one row per study, through the peak of the studies' average: red positive, blue negative; then how
    those means agree, as a matrix."""
    drawer = _Drawer(fs)
    for concept, items in tiles.items():
        vmax = max(float(np.nanpercentile(np.abs(m), 99)) for _, m in items) or 1.0
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)  # voxels no study covers
            focus = drawer.focus(np.nanmean(np.stack([m for _, m in items]), axis=0))
        png, figure = drawer.draw(items, Scale("diverging", -vmax, vmax, "mean of the study's standardised maps "
                                              "(SD units; each map z-scored over its voxels)"), focus,
                                  note=f"Background: the {drawer.base.background_name}, darker outside the set's "
                                       "mask. Slices through the largest absolute value of the studies' average.")
        report.add_picture(f"concept:{concept}", f"concept {concept!r}: mean standardised map per study, one row "
                           "each (" + ", ".join(s for s, _ in items) + "); red positive, blue negative",
                           png, figure)
        if concept in matrices:
            report.add_figure(f"agreement:{concept}", f"concept {concept!r}: how the studies' mean maps agree "
                              "(r, study x study)", matrices[concept])


def _check_target(store, fs, add) -> None:
    """What the set's target says about itself (a grayordinate template's assumed cortex mesh), and rows
    left without the cortex for want of its mesh."""
    for level, code, message, remedy in fs.target.caveats():
        add(Finding(level, "grid", code, fs.name, message, remedy))
    n = store.sql("SELECT count(*) AS n FROM features WHERE feature_set = " + _lit(fs.name) +
                  " AND missing_from LIKE '%no-cortex-mesh%'").to_pylist()[0]["n"]
    if n:
        add(Finding("warning", "coverage", "no-cortex-mesh", fs.name,
                    f"{n} volume map(s) have no cortex values: the template's cortex mesh is not known",
                    "rebuild the set with --mesh MESH.json (the template cortex's surfaces; 'mapstore mesh' "
                    "describes a FreeSurfer subject folder)"))


def _model_key(m: dict) -> tuple:
    """The model a map comes from: its dataset and entities but contrast and stat."""
    ents = json.loads(m["entities"] or "{}")
    return (m["dataset"],) + tuple(sorted((k, v) for k, v in ents.items()
                                          if k not in ("contrast", "stat", "contrast_number")))


def _check_copies(fs, maps, add, report) -> None:
    """Groups of maps whose feature rows are identical or near-copies (the set's copies table)."""
    table = fs.copies()
    if table is None:
        return
    by_id = {m["map_id"]: m for m in maps}
    pairs, same_model = [], 0
    for c in table.to_pylist():
        a, b = by_id.get(c["map_a"]), by_id.get(c["map_b"])
        if a is None or b is None:
            continue
        if _model_key(a) == _model_key(b):
            same_model += 1  # one model's t, z, p and effect maps of a contrast, or its variance maps
            continue
        pairs.append((c, a, b))
    if same_model:
        add(Finding("info", "provenance", "copies-within-model", "catalog",
                    f"{same_model} pair(s) of maps of one model correlate at |r| >= 0.9 (a contrast's t, z, p and "
                    "effect maps; a model's variance maps): expected, and they stay on one side of any split",
                    "nothing to do"))
    # groups: connected components over the pairs
    parent: dict[str, str] = {}

    def find(x: str) -> str:
        while parent.setdefault(x, x) != x:
            parent[x] = parent[parent[x]]
            x = parent[x]
        return x

    for c, _, _ in pairs:
        parent[find(c["map_a"])] = find(c["map_b"])
    groups: dict[str, list] = defaultdict(list)
    for c, a, b in pairs:
        groups[find(c["map_a"])].append((c, a, b))
    rows = []
    for members in groups.values():
        ids = sorted({x for c, _, _ in members for x in (c["map_a"], c["map_b"])})
        studies = {by_id[i]["study"] for i in ids}
        people = {by_id[i]["participant"] for i in ids}
        kinds = {c["kind"] for c, _, _ in members}
        worst = min(members, key=lambda t: -abs(t[0]["r"]))[0]
        where = "across studies" if len(studies) > 1 else "within one study"
        who = "one subject" if len(people) == 1 and None not in people else "different subjects"
        listing = "; ".join(f"{by_id[i]['dataset']}:{by_id[i]['relpath']}" for i in ids[:4])
        add(Finding("warning", "provenance", "identical-rows" if kinds == {"identical"} else "near-copies",
                    ids[0], f"{len(ids)} maps {where}, {who}, are "
                    + ("identical feature rows" if kinds == {"identical"} else
                       f"copies (|r| up to {abs(worst['r']):.3f}{', sign-flipped' if worst['r'] < 0 else ''})")
                    + f": {listing}" + (" ..." if len(ids) > 4 else ""),
                    "keep one of them, or group the splits so that they stay on one side (the export refuses "
                    "splits across them); SELECT * FROM feature_copies lists the pairs"))
        for c, a, b in members:
            rows.append({"map_a": f"{a['dataset']}:{a['relpath']}", "map_b": f"{b['dataset']}:{b['relpath']}",
                         "kind": c["kind"], "r": round(c["r"], 4), "same_study": a["study"] == b["study"],
                         "same_subject": a["participant"] is not None and a["participant"] == b["participant"]})
    if rows:
        report.add_table("copies", "copies (identical and near-identical maps)", pa.Table.from_pylist(rows))


def _check_features(store, fs, maps, min_coverage, add, report, pictures, max_rows) -> None:
    # the columns the checks read (not the sketches, which are most of a row's bytes)
    rows = store.sql("SELECT map_id, coverage, p_clipped, vmin, vmax, stat_out FROM features "
                     f"WHERE feature_set = '{fs.name}' ORDER BY map_id").to_pylist()
    stat_of = {m["map_id"]: m for m in maps}
    for p in store.sql(f"SELECT * FROM feature_problems WHERE feature_set = '{fs.name}'").to_pylist():
        if p["code"] == "no-value-in-mask":  # an empty row is not built: the coverage check reports it
            add(Finding("error", "coverage", "no-coverage", p["map_id"], f"{p['path']}: no mask voxel has a value",
                        p["remedy"]))
            continue
        add(Finding("error", "features", f"feature-{p['code']}", p["map_id"], f"{p['path']}: {p['reason']}",
                    p["remedy"]))
    for r in rows:
        m = stat_of.get(r["map_id"])
        if m is None:
            continue
        name = m["relpath"]
        if r["coverage"] == 0:
            add(Finding("error", "coverage", "no-coverage", r["map_id"],
                        f"{name}: no mask voxel has a value", "check the map's affine and space"))
        elif r["coverage"] < min_coverage:
            add(Finding("warning", "coverage", "low-coverage", r["map_id"],
                        f"{name}: covers {r['coverage']:.0%} of the mask (threshold {min_coverage:.0%})",
                        "drop it with --min-coverage, or choose a coverage-based mask"))
        if r.get("p_clipped"):
            add(Finding("warning", "stat", "p-zero-clipped", r["map_id"],
                        f"{name}: {r['p_clipped']} voxel(s) with p = 0 inside the model's mask were taken as the "
                        "smallest positive p (z ~ 37.5)", "expected for very strong effects in float32 p maps; "
                        "prefer the z or t map of the same contrast"))
        vmin, vmax = r.get("vmin"), r.get("vmax")
        if vmin is None or vmax is None:
            continue
        stat = r["stat_out"]
        if stat == "p" and (vmin < 0 or vmax > 1):
            add(Finding("error", "stat", "p-out-of-range", r["map_id"],
                        f"{name}: p values from {vmin:g} to {vmax:g}, outside [0, 1]",
                        "the map is not a p map (a log p or 1-p map?); rename or fix it"))
        if stat == "variance" and vmin < 0:
            add(Finding("error", "stat", "negative-variance", r["map_id"],
                        f"{name}: negative variance ({vmin:g})", "the map is not a variance map; rename it"))
        if vmin == vmax:
            add(Finding("error", "stat", "constant-map", r["map_id"],
                        f"{name}: every covered voxel is {vmin:g}", "the model probably failed; re-run it"))
    cov = np.array([r["coverage"] for r in rows])
    if cov.size:
        by_study: dict[str, list[float]] = defaultdict(list)
        for r in rows:
            if r["map_id"] in stat_of:
                by_study[stat_of[r["map_id"]]["study"]].append(r["coverage"])
        report.add_table("coverage-by-study", "coverage by study", pa.Table.from_pylist([
            {"study": s, "maps": len(v), "min": round(min(v), 3), "mean": round(float(np.mean(v)), 3),
             f"below {min_coverage:g}": int(sum(x < min_coverage for x in v))} for s, v in sorted(by_study.items())]))
    if pictures and rows:
        _coverage_pictures(fs, rows, stat_of, report, max_rows)


def _coverage_pictures(fs, rows, stat_of, report, max_rows) -> None:
    """Fraction of maps with a value at each voxel: all maps, then each study; and the distribution of
    the stored values per study and stat."""
    ids = [r["map_id"] for r in rows if r["map_id"] in stat_of]
    pick = ids if len(ids) <= max_rows else [ids[i] for i in np.linspace(0, len(ids) - 1, max_rows).astype(int)]
    stat_out = {r["map_id"]: r["stat_out"] for r in rows}
    counts = np.zeros(fs.n_voxels)
    per_study: dict[str, np.ndarray] = {}
    per_n: Counter = Counter()
    samples: dict[tuple[str, str], list[np.ndarray]] = defaultdict(list)
    rng = np.random.default_rng(0)
    block = 64
    for i in range(0, len(pick), block):
        part = pick[i:i + block]
        X = fs.matrix(part)
        finite = np.isfinite(X)
        counts += finite.sum(axis=0)
        for mid, row, ok in zip(part, X, finite):
            s = stat_of[mid]["study"]
            per_study.setdefault(s, np.zeros(fs.n_voxels))
            per_study[s] += ok
            per_n[s] += 1
            key = (s, str(stat_out.get(mid) or stat_of[mid]["stat"]))
            if len(samples[key]) < _HIST_MAPS:
                vals = row[ok]
                samples[key].append(vals if vals.size <= 5000 else rng.choice(vals, 5000, replace=False))
    frac = counts / max(len(pick), 1)
    drawer = _Drawer(fs)
    scale = Scale("sequential", 0.0, 1.0, "fraction of the maps with a value (red: none, blue: all)", opacity=0.5)
    note = (f"{drawer.base.picture_caption.capitalize()}. Background: the {drawer.base.background_name}, darker "
            "outside the set's mask; the colours are drawn at half strength so its anatomy shows through.")
    png, figure = drawer.draw([(f"all {len(pick)} maps", frac)], scale, note=note)
    report.add_picture("coverage", f"coverage over {len(pick)} maps ({drawer.base.picture_caption})", png, figure)
    if per_study:
        studies = sorted(per_study)
        png, figure = drawer.draw([(f"{s} ({per_n[s]})", per_study[s] / per_n[s]) for s in studies], scale, note=note)
        report.add_picture("coverage-per-study", "coverage per study, one row each: " + ", ".join(studies), png,
                           figure)
    if samples:
        report.add_figure("values-by-study", "stored values per study and stat (a sample of up to "
                          f"{_HIST_MAPS} maps each; one range per stat: a study on another scale or with flipped "
                          "signs stands out; red line: the median)",
                          histograms_html({k: np.concatenate(v) for k, v in samples.items()}))


_HIST_MAPS = 6  # maps per study and stat in the value histograms
_STRONG_Z = 3.0  # |pooled z| where a concept's heterogeneity across studies is summarised
_MIN_MAPS_TO_WEIGH = 10  # maps a study needs for its spread to weigh it in the check's pooled summary


def report_json(report: CheckReport) -> str:
    return json.dumps({"store": report.store, "feature_set": report.feature_set,
                       "findings": [f.__dict__ for f in report.findings],
                       "tables": {k: v.to_pylist() for k, v in report.tables.items()},
                       "titles": report.titles}, indent=1, default=str)

"""Rebuild an export from its manifest and the source datasets, on another machine: index the sources
into a new store, build the feature set with the manifest's settings, label with the vocabulary it
recorded, select the same maps (by dataset name and path inside it) in the same order, export, and
compare every row of X with the hash the manifest recorded."""

from __future__ import annotations

import json
import os
import shutil
import tempfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from ._api import open_store
from .errors import ExportError, ParameterError
from .features import build_features
from .indexing import builtin_rules, fetch_files, index
from .labels import label_store
from .select import ExportManifest, read_manifest
from .store import check_output
from .targets import KINDS

__all__ = ["RebuildReport", "rebuild"]


@dataclass
class RebuildReport:
    """What ``rebuild`` made and how it compares with the manifest."""

    out: str
    store: str
    n_rows: int
    n_equal: int
    differences: list[str] = field(default_factory=list)

    @property
    def ok(self) -> bool:
        return not self.differences and self.n_equal == self.n_rows

    def summary(self) -> str:
        head = f"rebuilt {self.n_rows} rows into {self.out} (store {self.store}): {self.n_equal} equal to the manifest"
        return head + ("" if self.ok else "\n" + "\n".join(f"  {d}" for d in self.differences[:20]))


def _build_arguments(man: ExportManifest) -> dict[str, Any]:
    """The feature-build arguments the manifest's set records, as its kind of target reads them."""
    spec = man.feature_settings
    kind = spec.get("geometry", "volume")  # manifests before the kind was recorded: volume sets
    if kind not in KINDS:
        raise ExportError(f"the manifest's feature set is of an unknown kind {kind!r} (known: {', '.join(KINDS)})")
    if not isinstance(spec.get("grid"), dict) or not isinstance(spec.get("mask"), dict):
        raise ExportError("the manifest's feature_settings have no grid and mask objects; export again")
    try:
        return KINDS[kind].rebuild_arguments(spec["grid"], spec["mask"], spec)
    except ParameterError as exc:
        raise ExportError(str(exc)) from exc


def _write_given(folder: Path, kind: str, i: int, given: dict[str, Any]) -> str:
    """A user file the manifest kept (its parsed content), written back as JSON for the index."""
    if not isinstance(given, dict) or not isinstance(given.get("content"), dict):
        raise ExportError(f"the manifest's index_inputs {kind} entry {i} has no content; give --{kind} yourself")
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / f"{kind}-{i}-from-manifest.json"
    path.write_text(json.dumps(given["content"]))
    return str(path)


def rebuild(manifest: str | os.PathLike[str], sources: list[str | os.PathLike[str]], out: str | os.PathLike[str], *,
            store: str | os.PathLike[str] | None = None, rules=None, origins=None, fetch: bool = False
            ) -> RebuildReport:
    """Rebuild the export ``manifest`` describes from the datasets under ``sources`` into ``out``.

    The name rules and origins the first index used are taken from the manifest, which keeps their
    content; ``rules`` and ``origins`` (files or preset names) replace them when given.  In datasets
    shared through git-annex, the manifest's maps whose content is not fetched are named (with
    ``fetch`` False) or fetched, and nothing else.
    """
    mpath, man = read_manifest(manifest)
    if man.datasets is None or "grid" not in man.feature_settings:
        raise ExportError(f"{mpath}: the manifest predates rebuilds (no feature settings or dataset names); "
                          "export again with this mapstore")
    _check_rebuild_fields(man, mpath)
    if store is not None:
        given_store = Path(store).expanduser().absolute()
        if given_store.is_dir() and any(given_store.iterdir()):
            raise ExportError(f"{given_store}: --store must be a new or empty folder: a rebuild makes its own store "
                              "and never changes one of yours")
        store_path = check_output(given_store, sources=[str(s) for s in sources], what="--store")
    else:
        _remove_leftovers()
        store_path = Path(tempfile.mkdtemp(prefix=f"mapstore-rebuild-{os.getpid()}-")) / "store"
    kept = man.index_inputs or {}
    # the files the manifest keeps, written back for the stages that read files; in a folder of their own
    # (never beside the user's store), removed at the end
    given = Path(tempfile.mkdtemp(prefix=f"mapstore-rebuild-inputs-{os.getpid()}-"))
    try:
        if rules is None and kept.get("rules"):
            presets = builtin_rules()
            for r in kept["rules"]:
                if "preset" in r and r["preset"] not in presets:
                    raise ExportError(f"{mpath}: the manifest names a preset {r['preset']!r} this mapstore does not "
                                      f"ship (presets: {', '.join(presets)}); give --rules yourself")
            rules = [r["preset"] if "preset" in r else _write_given(given, "rules", i, r)
                     for i, r in enumerate(kept["rules"])]
        if origins is None and kept.get("origins"):
            origins = _write_given(given, "origins", 0, kept["origins"])
        report = _rebuild(man, sources, out, store_path, given, rules, origins, fetch)
        if store is None:
            (store_path.parent / "DONE").write_text("")  # a finished rebuild's store: kept for the user
        return report
    finally:
        shutil.rmtree(given, ignore_errors=True)


def _not_fetched(man: ExportManifest, store_path: Path) -> list[str]:
    """Paths of the manifest's source maps that the new catalog holds as not present."""
    names = {k: v["name"] for k, v in (man.datasets or {}).items()}
    wanted = {(names.get(s.dataset), s.relpath) for s in man.sources}
    st = open_store(store_path)
    try:
        rows = st.sql("SELECT d.name, d.root, m.relpath FROM maps m JOIN datasets d USING (dataset) "
                      "WHERE m.content = 'not-present'").to_pylist()
    finally:
        st.close()
    return sorted(os.path.join(r["root"], r["relpath"]) for r in rows if (r["name"], r["relpath"]) in wanted)


def _remove_leftovers() -> None:
    """Temporary folders of rebuilds whose process died (a finished rebuild's store holds DONE)."""
    import re

    base = Path(tempfile.gettempdir())
    for p in base.glob("mapstore-rebuild-*"):
        m = re.match(r"mapstore-rebuild-(?:inputs-)?(\d+)-", p.name)
        if m is None or not p.is_dir() or (p / "DONE").exists():
            continue
        try:
            os.kill(int(m.group(1)), 0)
        except ProcessLookupError:
            shutil.rmtree(p, ignore_errors=True)
        except PermissionError:
            pass


def _check_rebuild_fields(man: ExportManifest, mpath: Path) -> None:
    """What rebuild reads beyond what verify does, typed; one line naming the field otherwise."""
    def need(ok: bool, what: str) -> None:
        if not ok:
            raise ExportError(f"{mpath}: malformed manifest ({what}); export again with this mapstore")

    fs = man.feature_settings
    for k in ("name", "method", "stat", "p_sided", "background"):
        need(isinstance(fs.get(k), str), f"feature_settings.{k} must be text")
    need(isinstance(fs.get("zero_as_missing"), bool), "feature_settings.zero_as_missing must be true or false")
    need(all(isinstance(v, dict) and isinstance(v.get("name"), str) for v in (man.datasets or {}).values()),
         "'datasets' must map keys to objects with a name")
    kept = man.index_inputs or {}
    for i, r in enumerate(kept.get("rules") or []):
        need(isinstance(r, dict) and (isinstance(r.get("preset"), str) or isinstance(r.get("content"), dict)),
             f"index_inputs.rules[{i}] must name a preset or hold content")


def _rebuild(man: ExportManifest, sources, out, store_path: Path, given: Path, rules, origins,
             fetch: bool = False) -> RebuildReport:
    index(sources, store_path, rules=rules, origins=origins, progress=False)
    absent = _not_fetched(man, store_path)
    if absent and not fetch:
        raise ExportError(f"{len(absent)} source map(s) of the manifest are annexed and not fetched (e.g. "
                          f"{absent[0]}); fetch them ('datalad get' or 'git annex get' on them), or rebuild "
                          "with --fetch, which fetches just these")
    if absent:
        problems = fetch_files(absent)
        if problems:
            raise ExportError(f"{problems[0].path}: {problems[0].reason}; {problems[0].remedy}")
        index(sources, store_path, rules=rules, origins=origins, progress=False)
    settings = man.feature_settings
    build = {"method": settings["method"], "stat": settings["stat"], "p_sided": settings["p_sided"],
             "zero_as_missing": settings["zero_as_missing"], "background": settings["background"],
             "model_maps": "model" in settings.get("kinds", ["contrast"])}
    build_features(store_path, settings["name"], **{**build, **_build_arguments(man)}, progress=False)
    if man.vocabulary_content:
        vocab = given / "vocabulary-from-manifest.json"
        vocab.write_text(json.dumps(man.vocabulary_content))
        label_store(store_path, vocab, inherit_broader=(man.vocabulary or {}).get("inherit_broader"))
    st = open_store(store_path)
    names = {k: v["name"] for k, v in (man.datasets or {}).items()}
    by_place = {}
    for r in st.sql("SELECT m.map_id, d.name, m.relpath, m.map_index FROM maps m JOIN datasets d "
                    "USING (dataset)").to_pylist():
        by_place[(r["name"], r["relpath"], r["map_index"])] = r["map_id"]
    wanted: list[Any] = []
    missing: list[Any] = []
    for s in man.sources:
        key = (names.get(s.dataset), s.relpath, s.map_index)
        (wanted if key in by_place else missing).append(by_place.get(key, key))
    if missing:
        raise ExportError(f"{len(missing)} source map(s) of the manifest are not under the sources given (e.g. "
                          f"{missing[0][0]}:{missing[0][1]}); give the folders that hold those datasets")
    q = man.query
    ids = ", ".join(f"'{m}'" for m in wanted)
    sel = st.select(f"map_id IN ({ids})", features=settings["name"], y_from=man.y_from,
                    concepts=q.get("concepts") if man.y_from in ("concept", "concepts") else None,
                    group_by=man.group_by, with_broader=bool(q.get("with_broader")),
                    missing=q.get("missing", "common"), min_voxels=q.get("min_voxels"), one_stat=False,
                    per_subject="map", level="any")
    pos = {m: i for i, m in enumerate(sel.map_ids)}
    lost = [src for src, m in zip(man.sources, wanted) if m not in pos]
    if lost:
        where = ", ".join(f"{src.dataset}:{src.relpath}" for src in lost[:5])
        raise ExportError(f"{len(lost)} map(s) of the manifest are not in the rebuilt selection (e.g. {where}): "
                          "the vocabulary no longer labels them with the manifest's concepts, or they have no "
                          "feature row; compare the vocabulary with the one the manifest kept")
    sel = sel.subset([pos[m] for m in wanted])  # the manifest's row order
    rep = st.export(out, sel, scheme=man.scheme, seed=man.seed, allow_leak=man.allow_leak,
                    allow_unseen=man.allow_unseen, fmt=man.layout)
    _, new = read_manifest(rep.out)
    diffs = [f"row {i} ({s.relpath}): X differs" for i, (s, n) in enumerate(zip(man.sources, new.sources))
             if s.x_hash != n.x_hash]
    if new.shape != man.shape:
        diffs.insert(0, f"X has shape {new.shape}, the manifest {man.shape}")
    return RebuildReport(str(rep.out), str(store_path), len(new.sources), len(new.sources) - len(diffs), diffs)

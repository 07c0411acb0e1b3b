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

from .errors import ExportError, ParameterError

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


def _grid_and_mask(man: dict[str, Any]) -> tuple[Any, str]:
    spec = man["feature_settings"]
    grid = spec["grid"]
    name = grid.get("name")
    grid_arg: Any = name if name in ("MNI152-1mm", "MNI152-2mm", "MNI152-3mm") else \
        {"shape": grid["shape"], "affine": grid["affine"]}
    mask = spec["mask"]["name"]
    if mask != "MNI152-brain":
        raise ParameterError(f"the export's feature set used mask {mask!r}: only the built-in brain mask can be "
                             "rebuilt from a manifest")
    return grid_arg, "brain"


def _write_given(folder: Path, kind: str, i: int, given: dict[str, Any]) -> str:
    """A user file the manifest kept (its parsed content), written back as JSON for the index."""
    if not isinstance(given, dict) or not isinstance(given.get("content"), dict):
        raise ExportError(f"the manifest's index_inputs {kind} entry {i} has no content; give --{kind} yourself")
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / f"{kind}-{i}-from-manifest.json"
    path.write_text(json.dumps(given["content"]))
    return str(path)


def rebuild(manifest: str | os.PathLike[str], sources: list[str | os.PathLike[str]], out: str | os.PathLike[str], *,
            store: str | os.PathLike[str] | None = None, rules=None, origins=None) -> RebuildReport:
    """Rebuild the export ``manifest`` describes from the datasets under ``sources`` into ``out``.

    The name rules and origins the first index used are taken from the manifest, which keeps their
    content; ``rules`` and ``origins`` (files or preset names) replace them when given.
    """
    mpath = Path(manifest)
    if mpath.is_dir():
        mpath = mpath / "manifest.json"
    try:
        man = json.loads(mpath.read_text())
    except (OSError, ValueError) as exc:
        raise ExportError(f"{mpath}: unreadable manifest ({exc})") from exc
    if "feature_settings" not in man or "datasets" not in man:
        raise ExportError(f"{mpath}: the manifest predates rebuilds (no feature settings or dataset names); "
                          "export again with this mapstore")
    store_path = Path(store) if store is not None else Path(tempfile.mkdtemp(prefix="mapstore-rebuild-")) / "store"
    kept = man.get("index_inputs") or {}
    # the files the manifest keeps, written back for the stages that read files; in a folder of their own
    # (never beside the user's store), removed at the end
    given = Path(tempfile.mkdtemp(prefix="mapstore-rebuild-inputs-"))
    try:
        if rules is None and kept.get("rules"):
            rules = [r["preset"] if "preset" in r else _write_given(given, "rules", i, r)
                     for i, r in enumerate(kept["rules"])]
        if origins is None and kept.get("origins"):
            origins = _write_given(given, "origins", 0, kept["origins"])
        return _rebuild(man, sources, out, store_path, given, rules, origins)
    finally:
        shutil.rmtree(given, ignore_errors=True)


def _rebuild(man: dict[str, Any], sources, out, store_path: Path, given: Path, rules, origins) -> RebuildReport:
    from . import build_features, index, label, open as open_store

    index(sources, store_path, rules=rules, origins=origins, progress=False)
    settings = man["feature_settings"]
    grid, mask = _grid_and_mask(man)
    build_features(store_path, settings["name"], grid=grid, mask=mask, method=settings["method"],
                   stat=settings["stat"], p_sided=settings["p_sided"], zero_as_missing=settings["zero_as_missing"],
                   background=settings["background"], model_maps="model" in settings.get("kinds", ["contrast"]),
                   progress=False)
    if man.get("vocabulary_content"):
        vocab = given / "vocabulary-from-manifest.json"
        vocab.write_text(json.dumps(man["vocabulary_content"]))
        label(store_path, vocab, inherit_broader=(man.get("vocabulary") or {}).get("inherit_broader"))
    st = open_store(store_path)
    names = {k: v["name"] for k, v in man["datasets"].items()}
    by_place = {}
    for r in st.sql("SELECT m.map_id, d.name, m.relpath, m.map_index FROM maps m JOIN datasets d "
                    "USING (dataset)").to_pylist():
        by_place[(r["name"], r["relpath"], r["map_index"])] = r["map_id"]
    wanted: list[Any] = []
    missing: list[Any] = []
    for s in man["sources"]:
        key = (names.get(s["dataset"]), s["relpath"], s.get("map_index"))
        (wanted if key in by_place else missing).append(by_place.get(key, key))
    if missing:
        raise ExportError(f"{len(missing)} source map(s) of the manifest are not under the sources given (e.g. "
                          f"{missing[0][0]}:{missing[0][1]}); give the folders that hold those datasets")
    q = man["query"]
    ids = ", ".join(f"'{m}'" for m in wanted)
    sel = st.select(f"map_id IN ({ids})", features=settings["name"], target=man["target"],
                    concepts=q.get("concepts") if man["target"] in ("concept", "concepts") else None,
                    group_by=man["group_by"], with_broader=bool(q.get("with_broader")),
                    missing=q.get("missing", "common"), min_voxels=q.get("min_voxels"), one_stat=False,
                    per_subject="map", level="any")
    pos = {m: i for i, m in enumerate(sel.map_ids)}
    sel = sel.subset([pos[m] for m in wanted])  # the manifest's row order
    rep = st.export(out, sel, scheme=man["scheme"], seed=man["seed"], allow_leak=man.get("allow_leak", False),
                    allow_unseen=man.get("allow_unseen", False), fmt=man.get("layout", "npy"))
    new = json.loads((Path(rep.out) / "manifest.json").read_text())
    diffs = [f"row {i} ({s['relpath']}): X differs" for i, (s, n) in enumerate(zip(man["sources"], new["sources"]))
             if s.get("x_sha256") != n.get("x_sha256")]
    if new["shape"] != man["shape"]:
        diffs.insert(0, f"X has shape {new['shape']}, the manifest {man['shape']}")
    return RebuildReport(str(rep.out), str(store_path), len(new["sources"]), len(new["sources"]) - len(diffs), diffs)

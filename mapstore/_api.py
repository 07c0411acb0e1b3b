"""The public face of a store: ``mapstore.open(DIR)`` returns a :class:`Store`."""

from __future__ import annotations

import os
import weakref
from typing import TYPE_CHECKING
from pathlib import Path

import pyarrow as pa

from ._params import TOP_K
from .errors import FeatureError, StoreClosed
from .store import Catalog, release_lease, take_lease

if TYPE_CHECKING:  # the stages load when a method first needs them: opening a store for SQL stays light
    from .check import CheckReport
    from .features import FeatureSet
    from .select import ExportReport, Selection

__all__ = ["Store", "open_store"]


class Store:
    """A mapstore store opened for reading.

    Parameters
    ----------
    path : path
        The store folder written by :func:`mapstore.index`.

    Examples
    --------
    ``store_path`` is a store the demo's maps were indexed into (``mapstore demo`` writes one):

    >>> import mapstore
    >>> store = mapstore.open(store_path)
    >>> store.sql("SELECT count(DISTINCT study) AS studies, count(*) AS maps FROM maps").to_pylist()
    [{'studies': 7, 'maps': 90}]
    >>> store.features().unit
    'voxels'
    """

    def __init__(self, path: str | os.PathLike[str]) -> None:
        self.path: Path = Path(path)
        self._open()

    def _open(self) -> None:
        """Read HEAD: the newest snapshot, held by a lease until ``close`` or ``refresh``."""
        catalog = Catalog(self.path)
        self.path = catalog.path
        # a lease keeps this snapshot's files from being collected by writers while the store is open
        lease = take_lease(self.path, catalog.head) if catalog.head.catalog else None
        self._finalizer = weakref.finalize(self, _release, catalog, lease)
        entry = catalog.head.labels
        if entry and entry.catalog != catalog.head.catalog and entry.copy:
            # the catalog was re-indexed after labelling: derive labels for it from the stored vocabulary
            from .labels import refresh_labels

            catalog.use_table("labels", refresh_labels(catalog, entry))
        self._catalog: Catalog | None = catalog

    @property
    def catalog(self) -> Catalog:
        if self._catalog is None:
            raise StoreClosed(f"{self.path}: the store was closed; open it again (mapstore.open)")
        return self._catalog

    @property
    def closed(self) -> bool:
        return self._catalog is None

    def close(self) -> None:
        """Close the catalog and let writers collect this snapshot's files (also done when the Store is
        garbage-collected); later calls raise :class:`~mapstore.errors.StoreClosed`."""
        self._finalizer()
        self._catalog = None

    def refresh(self) -> "Store":
        """Move to the store's newest snapshot (what writers committed since this one was opened)."""
        old = self._finalizer
        self._open()
        old()
        return self

    def __enter__(self) -> "Store":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def __repr__(self) -> str:
        return f"Store({str(self.path)!r}, maps={self.sql('SELECT count(*) FROM maps').column(0)[0].as_py()})"

    def _repr_html_(self) -> str:
        from .formats import html_table

        rows = self.sql("SELECT study, count(DISTINCT participant) AS subjects, count(*) AS maps, "
                        "string_agg(DISTINCT stat, ', ' ORDER BY stat) AS stats FROM maps GROUP BY study "
                        "ORDER BY study").to_pylist()
        sets = ", ".join(self.feature_sets()) or "none"
        return html_table(f"mapstore store {self.path} (feature sets: {sets}; labels: "
                          f"{'yes' if self.catalog.head.labels else 'no'})", ["study", "subjects", "maps", "stats"],
                          [[r["study"], r["subjects"], r["maps"], r["stats"]] for r in rows])

    def sql(self, query: str) -> pa.Table:
        """Run one read-only SQL query over the catalog views; returns an Arrow table.

        Views: ``maps``, ``datasets``, ``participants``, ``problems``, ``labels``, ``features``,
        ``feature_sets``, ``feature_problems``, ``feature_copies``, ``map_families``.  Call
        ``.to_pandas()`` on the result for a DataFrame.  Read tables through the views, not the
        store's Parquet files: old parts stay on disk until collected, so globbing them counts rows twice.
        """
        return self.catalog.sql(query)

    def table(self, name: str) -> pa.Table:
        """A whole catalog table as Arrow (``maps``, ``datasets``, ``participants``, ...)."""
        return self.catalog.table(name)

    def feature_sets(self) -> list[str]:
        """Names of the feature sets in the store (``SELECT * FROM feature_sets`` for details)."""
        return sorted(self.catalog.head.features)

    def features(self, name: str | None = None) -> FeatureSet:
        """A feature set by name; with no name, the default (or only) set."""
        self.catalog.require_catalog()
        head = self.catalog.head
        if name is None:
            name = head.default_features
            if name is None:
                raise FeatureError(f"{self.path}: no feature set yet; run 'mapstore features --store "
                                   f"{self.path}'")
        if name not in head.features:
            raise FeatureError(f"{self.path}: no feature set {name!r}; sets: {self.feature_sets() or 'none'}")
        from .features import FeatureSet

        return FeatureSet(self.path, name, head.features[name])

    def select(self, where: str | None = None, *, concepts: list[str] | None = None,
               task: list[str] | None = None, stat: list[str] | None = None, features: str | None = None,
               min_coverage: float | None = None, y_from: str = "contrast", group_by: str = "study",
               with_broader: bool = False, missing: str = "common", min_voxels: int | None = None,
               one_stat: bool = True, per_subject: str = "contrast", level: str | list[str] = "subject",
               target: str | None = None) -> Selection:
        """Choose maps for a decoder: returns a :class:`~mapstore.select.Selection`.

        Parameters
        ----------
        where : str, optional
            SQL predicate over ``maps`` joined with participants' columns and a
            ``concepts`` list of direct labels (e.g. ``"stat = 't' AND age >= 20"`` or
            ``"list_contains(concepts, 'reading')"``).
        concepts, task, stat : list of str, optional
            Keep maps labelled with one of these concepts / of these tasks / stats.
        features : str, optional
            Feature set name (default: the store's default set).
        min_coverage : float, optional
            Drop maps covering less than this fraction of the mask (reported in ``dropped``).
        y_from : {"contrast", "study-contrast", "concept", "concepts"} or a column, default="contrast"
            What ``y`` is made from.
            ``study-contrast``: each study's contrast names kept apart (``study/contrast``);
            ``concept``: one concept per map (``y``); ``concepts``: multi-label ``Y``; a maps or
            participants column (a numeric one, such as ``age``, stays numeric).
        group_by : str, default="study"
            ``study``, ``site``, ``lab``, ``subject``, ``dataset``, any maps or participants column,
            or ``metadata:KEY`` (a sidecar field, e.g. ``metadata:ManufacturersModelName``).
        with_broader : bool, default=False
            Count inherited broader concepts as labels too.
        missing : {"common", "zero", "keep"}, default="common"
            Voxels some selected map has no value for: ``common`` keeps only the voxels with a
            value in every map (``sel.voxels``; ``sel.missing_report`` says how many were
            dropped), ``zero`` fills 0, ``keep`` leaves NaN (for a pipeline with an imputer,
            fitted inside each fold).  Nothing is imputed from data across folds.
        min_voxels : int, optional
            With ``common``, refuse (naming the maps covering least) when fewer voxels remain;
            default 1% of the mask.
        one_stat : bool, default=True
            Keep one stat per subject and contrast: z, else t, F, p, effect, variance (a study that
            ships t and z maps of the same contrast would otherwise count twice).
        per_subject : {"contrast", "one", "map"}, default="contrast"
            ``contrast``: one map per subject, task and contrast (the subject-level map where the
            writer left one, else the first session and run); ``one``: one map per subject (for a
            participant target); ``map``: every map.  What went is counted in ``dropped``.
        level : {"subject", "any", "run", "session", "group", "unknown"} or list, default="subject"
            Whom the maps summarise (the catalog's ``level``): ``subject`` takes one person's maps
            (run, session and subject level), so a group map never enters subject-level work as a
            subject; ``group`` takes group maps, ``any`` every map.  The rest are counted in
            ``dropped`` by level.

        Examples
        --------
        Decode two concepts across studies, each study held out in turn:

        >>> import mapstore
        >>> from sklearn.linear_model import LogisticRegression
        >>> from sklearn.model_selection import cross_val_score
        >>> store = mapstore.open(store_path)
        >>> sel = store.select(concepts=["reading", "listening"], y_from="concept", stat=["t", "z"])
        >>> sorted(set(sel.y)), sel.meta["study"].nunique()
        (['listening', 'reading'], 5)
        >>> scores = cross_val_score(LogisticRegression(max_iter=200), sel.X, sel.y,
        ...                          cv=sel.splits("leave-one-group-out"))
        >>> len(scores)
        5
        """
        from .select import select

        return select(self, where, concepts=concepts, task=task, stat=stat, features=features,
                      min_coverage=min_coverage, y_from=y_from, group_by=group_by, with_broader=with_broader,
                      missing=missing, min_voxels=min_voxels, one_stat=one_stat, per_subject=per_subject,
                      level=level, target=target)

    def export(self, out, selection: Selection | None = None, *, scheme: str = "leave-one-group-out",
               seed: int = 0, allow_leak: bool = False, fmt: str = "npy", overwrite: bool = False,
               near_copy_r: float | None = None, allow_unseen: bool = False,
               participant_columns: list[str] | None = None, **select_options) -> ExportReport:
        """Export a selection (made from ``select_options`` if not given) with its manifest.

        ``participant_columns`` (personal data: none by default) adds those participants.tsv
        columns to ``meta.parquet``; the manifest lists them."""
        from .select import export_selection

        sel = selection if selection is not None else self.select(**select_options)
        return export_selection(sel, out, scheme=scheme, seed=seed, allow_leak=allow_leak, fmt=fmt,
                                overwrite=overwrite, near_copy_r=near_copy_r, allow_unseen=allow_unseen,
                                participant_columns=participant_columns)

    def similar(self, query, k: int = 10, *, features: str | None = None, absolute: bool = False,
                stat: str | None = None, **transform_options):
        """The ``k`` maps of a feature set most similar to ``query`` (a map id of the set, or a new map:
        a path or nibabel image, run through :meth:`FeatureSet.transform` with ``stat`` and options).

        Similarity is the correlation on the voxels both maps have (sign kept; ``absolute`` ranks
        by absolute r), shortlisted from the stored sketches and ranked exactly.  Returns a pandas
        DataFrame: map_id, r, n_common, study, dataset, task, contrast, stat, concepts, coverage, relpath.
        """
        import pandas as pd

        from .features import most_similar

        TOP_K.check("k", k, "Store.similar")
        fs = self.features(features)
        exclude = None
        if isinstance(query, str) and not os.path.exists(query):
            if query not in set(fs.map_ids):
                raise FeatureError(f"{query}: neither a file nor a map with a row in feature set {fs.name!r}; "
                                   "give a map id of the set (SELECT map_id FROM features) or a map's path")
            vector, exclude = fs.matrix([query])[0], query
        else:
            vector = fs.transform(query, stat, **transform_options)
        hits = most_similar(fs, vector, k, absolute=absolute, exclude=exclude)
        cols = ["map_id", "r", "n_common", "study", "dataset", "task", "contrast", "stat", "concepts", "coverage",
                "relpath"]
        if not hits:
            return pd.DataFrame(columns=cols)
        found = pd.DataFrame(hits, columns=["map_id", "r", "n_common"])
        info = self.sql(
            "SELECT m.map_id, m.study, m.dataset, m.task, m.contrast, m.stat, m.relpath, f.coverage, "
            "coalesce(l.concepts, []) AS concepts FROM maps m JOIN features f ON f.map_id = m.map_id AND "
            f"f.feature_set = '{fs.name}' LEFT JOIN (SELECT map_id, list(concept ORDER BY concept) AS concepts "
            "FROM labels WHERE direct GROUP BY map_id) l ON l.map_id = m.map_id "
            "WHERE m.map_id IN (" + ", ".join("'" + str(m).replace("'", "''") + "'" for m in found["map_id"]) + ")").to_pandas()
        return found.merge(info, on="map_id", how="left")[cols]

    def check(self, features: str | None = None, *, min_coverage: float = 0.8,
              pictures: bool = True, min_agreement: float = 0.2) -> CheckReport:
        """Grid, space, coverage, stat-type, metadata, copy and concept-agreement findings (mapstore.check)."""
        from .check import check_store

        return check_store(self, features, min_coverage=min_coverage, pictures=pictures,
                           min_agreement=min_agreement)

    def to_image(self, vector, name: str | None = None):
        """A NIfTI image (nibabel) of a feature vector or decoder coefficients on a set's grid."""
        return self.features(name).to_image(vector)


def _release(catalog: Catalog, lease) -> None:
    catalog.close()
    release_lease(lease)


def open_store(path: str | os.PathLike[str]) -> Store:
    """Open a store for reading (see :class:`Store`)."""
    return Store(path)

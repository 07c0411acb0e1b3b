"""Command line: parse options, call the public API, print, map errors to exit codes.

Exit codes: 0 success, 1 a failure (mapstore could not do what was asked: bad input, a file it
cannot read or write), 2 a usage error, 3 ``check`` or ``verify`` ran and found something at the
``--fail-on`` level (check) or a change (verify).  A user error never prints a traceback.
"""

from __future__ import annotations

import json
import re
import sys
import time
from pathlib import Path

import click

from ._version import __version__
from .errors import MapstoreError, ParameterError
from ._params import (AGREEMENT, CHECK_COVERAGE, DEMO_SCALE, BACKGROUND, EXPORT_FORMAT, FDR_Q, FEATURE_STAT, JOBS, LEVEL, MAP_MB_LIMIT, MIN_COVERAGE, MIN_STUDIES,
                      MIN_SUBJECTS, MIN_VOXELS, MISSING, NEAR_COPY, P_SIDE, PER_SUBJECT_RULE, POOL_METHOD,
                      READ_TIMEOUT, RESAMPLE_METHOD, TOP_K)
from .statkinds import POOL_DEFAULT, POOLABLE

# Each command imports the stage it runs when it runs: `mapstore --help` (and a typo) never pays for
# numpy, pyarrow, DuckDB or scikit-learn.


def open_store(path):
    from ._api import open_store as run

    return run(path)


def run_index(*args, **kwargs):
    from .indexing import index as run

    return run(*args, **kwargs)


def report_json(report) -> str:
    from .check import report_json as run

    return run(report)


def verify_export(manifest):
    from .select import verify as run

    return run(manifest)


def build_features(*args, **kwargs):
    from .features import build_features as run

    return run(*args, **kwargs)


def schema_names() -> list[str]:
    from .formats import schema_names as run

    return run()


def schema_text(name: str) -> str:
    from .formats import schema_text as run

    return run(name)


def text_table(*args, **kwargs) -> str:
    from .formats import text_table as run

    return run(*args, **kwargs)


def label_store(*args, **kwargs):
    from .labels import label_store as run

    return run(*args, **kwargs)

FINDINGS_EXIT = 3  # check found something at --fail-on, or verify found a change (1 is a failure to run)


def _plural(n: int, one: str, many: str | None = None) -> str:
    from .formats import plural

    return plural(n, one, many)


def _target(path: str | None, option: str) -> None:
    """Refuse an output path whose folder does not exist, before any work is done."""
    if path and not Path(path).expanduser().absolute().parent.is_dir():
        raise click.BadParameter(f"{path}: the folder {Path(path).expanduser().absolute().parent} does not "
                                 "exist; create it first", param_hint=option)


LEVEL_OPTION = click.option("--level", "level", multiple=True, type=LEVEL.click_type(), default=("subject",),
                            show_default=True, help="Whom the maps summarise (repeatable): subject takes one "
                            "person's maps (run, session, subject level); group, any, or a level by name.")
STORE_OPTION = click.option("--store", "store", required=True, type=click.Path(file_okay=False),
                            envvar="MAPSTORE_STORE", show_envvar=True,
                            help="Store folder (created by 'mapstore index').")


class _InWorkflowOrder(click.Group):
    """Commands listed in the order a study is pooled, not alphabetically."""

    ORDER = ("index", "features", "labels", "export", "verify", "rebuild", "check", "sql", "similar", "pool",
             "parcels", "mesh", "schema", "demo")

    def list_commands(self, ctx: click.Context) -> list[str]:
        names = super().list_commands(ctx)
        return [n for n in self.ORDER if n in names] + [n for n in names if n not in self.ORDER]


@click.group(cls=_InWorkflowOrder, context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="mapstore")
def cli() -> None:
    """Pool brain statistic maps from many BIDS derivative datasets into one store.

    \b
    The job, in order (MAPSTORE_STORE=DIR can replace --store):
      mapstore index /data/studyA /data/consortium --store DIR   the catalog of every map
      mapstore features --store DIR                              every map once onto one grid
      mapstore labels --store DIR --vocab concepts.yaml          contrast names -> concepts
      mapstore export --store DIR --concept reading --out OUT    X, y, groups, splits, manifest
      mapstore check --store DIR --html check.html               findings and a report
      mapstore pool --store DIR --concept reading --out OUT      do the studies agree, and where?
    \b
    Around it:
      verify OUT        has anything an export or a pooled map came from changed since?
      rebuild MANIFEST  make a colleague's export again from their manifest and your copies
      sql               read-only SQL over the catalog's views (maps, labels, features, ...)
      similar           the stored maps most like a new map
      parcels           reduce a feature set to one value per parcel of an atlas
      mesh              describe a FreeSurfer subject's surfaces as a mesh for --grid or --mesh
      schema            the JSON Schemas of the files mapstore reads and writes
      demo FOLDER       all of it on invented data (about 3 minutes)

    Exit codes: 0 done; 1 failed; 2 the command line is wrong; 3 check or verify found something.
    """


def _json_cell(v):
    """A value JSON has no type for: bytes as hex, anything else (intervals, UUIDs, times) as text."""
    return v.hex() if isinstance(v, (bytes, bytearray)) else str(v)


def _csv_ok(t) -> bool:
    import pyarrow as pa

    return not (pa.types.is_nested(t) or pa.types.is_binary(t) or pa.types.is_large_binary(t)
                or pa.types.is_fixed_size_binary(t) or pa.types.is_interval(t) or pa.types.is_union(t)
                or pa.types.is_dictionary(t))


def _parquet_ok(t) -> bool:
    import pyarrow as pa

    if pa.types.is_interval(t) or pa.types.is_union(t):
        return False
    if pa.types.is_list(t) or pa.types.is_large_list(t) or pa.types.is_fixed_size_list(t):
        return _parquet_ok(t.value_type)
    if pa.types.is_struct(t):
        return all(_parquet_ok(t.field(i).type) for i in range(t.num_fields))
    return True


def write_table(table, fmt: str, out: str | None) -> None:
    import pyarrow as pa

    if fmt == "parquet":
        import pyarrow.parquet as pq

        if not out:
            raise click.UsageError("--format parquet needs --out FILE")
        try:
            pq.write_table(table, out)
        except (pa.ArrowNotImplementedError, pa.ArrowInvalid) as exc:
            kinds = ", ".join(f"{f.name} ({f.type})" for f in table.schema if not _parquet_ok(f.type))
            raise ParameterError(f"Parquet cannot hold column(s) {kinds or '?'}: cast them in the query "
                                   "(e.g. CAST(x AS VARCHAR)), or use --format csv or json") from exc
        click.echo(f"wrote {table.num_rows} rows to {out}", err=True)
        return
    if fmt == "csv":
        import io

        import pyarrow.csv as pacsv

        buf = io.BytesIO()
        flat = table
        for i, field in enumerate(table.schema):
            if not _csv_ok(field.type):  # nested, binary, interval, union: one JSON text per cell
                flat = flat.set_column(i, field.name, pa.array(
                    [None if v is None else json.dumps(v, default=_json_cell) for v in table.column(i).to_pylist()],
                    pa.string()))
        pacsv.write_csv(flat, buf)
        text = buf.getvalue().decode()
    elif fmt == "json":
        text = json.dumps(table.to_pylist(), default=_json_cell, indent=1) + "\n"
    else:
        text = text_table(table) + "\n"
    if out:
        Path(out).write_text(text)
        click.echo(f"wrote {table.num_rows} rows to {out}", err=True)
    else:
        click.echo(text, nl=False)


@cli.command("index")
@click.argument("roots", nargs=-1, required=True, type=click.Path(exists=True))
@STORE_OPTION
@click.option("--rules", multiple=True,
              help="Name-rules file for maps without BIDS statmap names, or a built-in preset: fsl-feat, spm "
                   "(repeatable).")
@click.option("--origins", type=click.Path(dir_okay=False),
              help="Mapping file setting study, site and lab per dataset or subject.")
@click.option("--jobs", type=JOBS.click_type(), default=None, help="Processes (default: all cores).")
@click.option("--prune", is_flag=True, help="Drop datasets from earlier runs not under these ROOTs.")
@click.option("--read-timeout", type=READ_TIMEOUT.click_type(), default=60.0, show_default=True,
              help="Seconds a file's read may make no progress before the file is skipped (read-timeout).")
@click.option("--max-map-mb", type=MAP_MB_LIMIT.click_type(), default=4096, show_default=True,
              help="Refuse a map whose header declares more voxel data than this (MiB), before reading it.")
@click.option("--dask", "dask_address", help="Run the crawl on this Dask scheduler (e.g. tcp://host:8786); "
              "workers must see the datasets and the store at the same paths.")
@click.option("--fetch", is_flag=True, help="In git-annex (DataLad) datasets, fetch the content of the maps "
              "the names take, and nothing else, before reading them (subdatasets installed first).")
@click.option("--transforms", multiple=True, type=click.Path(file_okay=False),
              help="Folder of registrations of native-space maps to a template (BIDS files named like _from-<space>_to-"
                   "<template>_mode-image_xfm.h5/.txt/.mat files); repeatable.")
def index_cmd(roots, store, rules, origins, jobs, prune, read_timeout, dask_address, fetch, transforms,
              max_map_mb) -> None:
    """Crawl ROOTs (derivative datasets, raw datasets with derivatives/, or folders of them).

    \b
    Example:
      mapstore index /data/studyA /data/consortium --store pooled --origins origins.yaml
    """
    report = run_index(roots, store, rules=list(rules) or None, origins=origins, jobs=jobs, prune=prune,
                       scheduler=dask_address, read_timeout=read_timeout, transforms=list(transforms),
                       max_map_mb=max_map_mb, fetch=fetch)
    click.echo(report.summary())


@cli.command("sql")
@STORE_OPTION
@click.argument("query")
@click.option("--format", "fmt", type=click.Choice(["table", "csv", "json", "parquet"]), default="table",
              show_default=True, help="Output format (parquet needs --out).")
@click.option("--out", type=click.Path(dir_okay=False), help="Write to FILE instead of standard output.")
def sql_cmd(store, query, fmt, out) -> None:
    """Run a read-only SQL QUERY over the views maps, datasets, participants, problems, labels, features,
    feature_sets, feature_problems, feature_copies and map_families.

    \b
    Example:
      mapstore sql --store pooled "SELECT study, stat, count(*) FROM maps GROUP BY ALL"
    """
    _target(out, "--out")
    table = open_store(store).sql(query)
    write_table(table, fmt, out)


@cli.command("features")
@STORE_OPTION
@click.option("--name", "name", help="Name of the feature set made (default: 'default' for the default settings).")
@click.option("--features", "name", hidden=True)  # the name it had; elsewhere --features is a set read
@click.option("--grid", default="MNI152-2mm", show_default=True,
              help="MNI152-1mm|MNI152-2mm|MNI152-3mm, a reference image, or a JSON {shape, affine} file; "
                   "fsaverage5 or a JSON mesh description (GIFTI surfaces per hemisphere) for a surface set "
                   "(both hemispheres per row, volume maps projected); a .dscalar.nii template for "
                   "grayordinates.")
@click.option("--mask", default="brain", show_default=True,
              help="brain (MNI152 brain mask; on a surface: the cortex, medial wall out), all (surfaces), "
                   "intersection, coverage:FRACTION, or a mask image.")
@click.option("--method", type=RESAMPLE_METHOD.click_type(), default="linear", show_default=True,
              help="Interpolation when a map is resampled onto the grid.")
@click.option("--stat", type=FEATURE_STAT.click_type(), default="native", show_default=True,
              help="Keep each map's stat, or convert t and p maps to z.")
@click.option("--p-sided", type=P_SIDE.click_type(), default="one", show_default=True,
              help="How p maps were computed (for --stat z).")
@click.option("--zero-as-missing", is_flag=True, help="Treat every exact zero in the maps as missing.")
@click.option("--background", type=BACKGROUND.click_type(), default="auto", show_default=True,
              help="Where a map's model left no mask: auto makes a zero background (exact zeros reaching "
                   "the volume's edge) missing; keep counts it as data.")
@click.option("--model-maps", is_flag=True, help="Also take model maps (a stat without a contrast).")
@click.option("--where", help="SQL predicate over maps (alias m) choosing the maps, e.g. \"m.stat = 't'\".")
@click.option("--projection", help="Surface sets: vol_to_surf parameters for volume maps, as JSON "
              "(e.g. '{\"kind\": \"line\", \"radius\": 3}'); default: five depths, white to pial.")
@click.option("--no-volumes", is_flag=True, help="Surface sets: leave volume maps out (no projection).")
@click.option("--mesh", type=click.Path(exists=True, dir_okay=False),
              help="Grayordinate sets: a JSON mesh description of the template's cortex (to project volume maps).")
@click.option("--subjects-dir", type=click.Path(exists=True, file_okay=False),
              help="FreeSurfer subjects folder: each subject's surf/?h.sphere.reg takes its space-fsnative maps "
                   "onto fsaverage.")
@click.option("--jobs", type=JOBS.click_type(), default=None, help="Processes (default: all cores).")
@click.option("--dask", "dask_address", help="Run on this Dask scheduler (e.g. tcp://host:8786).")
@click.option("--list", "list_only", is_flag=True, help="List the store's feature sets and stop.")
def features_cmd(store, name, grid, mask, method, stat, p_sided, zero_as_missing, background, model_maps, where,
                 projection, no_volumes, mesh, subjects_dir, jobs, dask_address, list_only) -> None:
    """Resample every map once onto one grid or mesh and mask (a named feature set).

    \b
    Example:
      mapstore features --store pooled --grid MNI152-3mm --stat z --name z3
    """
    if list_only:
        click.echo(text_table(open_store(store).sql("SELECT * FROM feature_sets")))
        return
    proj = None
    if projection:
        try:
            proj = json.loads(projection)
        except ValueError as exc:
            raise click.BadParameter(f"not JSON ({exc})", param_hint="--projection") from exc
    settings = dict(grid=grid, mask=mask, method=method, stat=stat, p_sided=p_sided, zero_as_missing=zero_as_missing,
                    background=background, model_maps=model_maps, where=where, projection=proj,
                    volumes=not no_volumes, mesh=mesh, subjects_dir=subjects_dir)
    started = time.perf_counter()
    from ._warm import build_settings, settings_digest, unchanged

    same = unchanged(store, settings_digest(__version__, build_settings(name, **settings)))
    if same is not None:  # the last build with these settings, on this catalog, left nothing to do
        click.echo("\n".join([same["head_line"], f"built 0 rows (0.0 maps/s), kept {same['n_rows']:,} unchanged, "
                              f"removed 0 stale, 0 failed in {time.perf_counter() - started:.1f} s",
                              *(f"left out {n} {why}" for why, n in same["left_out"].items())]))
        return
    report = build_features(store, name, **settings, jobs=jobs, scheduler=dask_address)
    click.echo(report.summary())


@cli.command("parcels")
@STORE_OPTION
@click.option("--atlas", required=True, help="A label image or a 4-D probabilistic atlas (NIfTI) for a volume "
              "set; LEFT.gii,RIGHT.gii label files for a surface set; store:NAME for a stored parcellation.")
@click.option("--from", "source", help="The voxel or surface set to reduce (default: the default set).")
@click.option("--features", "--source", "old_source", hidden=True)
@click.option("--name", help="Name of the new parcel set (default: FROM-ATLAS).")
def parcels_cmd(store, atlas, source, old_source, name) -> None:
    """Reduce a feature set to one value per parcel of an atlas (a new feature set).

    \b
    Example:
      mapstore parcels --store pooled --atlas atlas.nii.gz --from default
    """
    from .features import build_parcels

    if old_source:  # --features names the set a command reads everywhere else; here the input is --from
        click.echo("note: 'parcels --features' is now 'parcels --from' (the set reduced)", err=True)
        source = source or old_source

    if "," in atlas and not atlas.startswith("store:"):
        left, right = atlas.split(",", 1)
        atlas = {"left": left, "right": right}
    click.echo(build_parcels(store, atlas, source=source, name=name).summary())


@cli.command("mesh")
@click.argument("subject_dir", type=click.Path(exists=True, file_okay=False))
@click.option("--out", required=True, type=click.Path(dir_okay=False), help="Mesh description (JSON) to write.")
@click.option("--space", help="The mesh's space (default: the folder's name, e.g. fsaverage6).")
def mesh_cmd(subject_dir, out, space) -> None:
    """Describe a FreeSurfer subject folder's surfaces as a mesh (for --grid or --mesh).

    \b
    Example:
      mapstore mesh $SUBJECTS_DIR/fsaverage6 --out fs6.json
    """
    from .targets import describe_freesurfer, mesh_from_description

    path = describe_freesurfer(subject_dir, out, space=space)
    t = mesh_from_description(path)
    click.echo(f"wrote {path}: mesh {t.name} (space {t.space}), {t.n_left:,} + {t.n_right:,} vertices, surfaces "
               f"{', '.join(t.kinds())}; cortex {'given' if t.file('L', 'cortex') else 'not given (every vertex)'}")


@cli.command("labels")
@STORE_OPTION
@click.option("--vocab", required=True, type=click.Path(exists=True, dir_okay=False),
              help="Concept vocabulary (YAML or JSON; its schema: 'mapstore schema vocabulary').")
@click.option("--inherit/--direct-only", "inherit", default=None,
              help="Also write inherited labels, the broader concepts of each concept a map is labelled with "
                   "(default: as the vocabulary says); 'export --with-inherited' selects by them.")
@click.option("--with-broader", "old_inherit", flag_value=True, default=None, hidden=True)
def labels_cmd(store, vocab, inherit, old_inherit) -> None:
    """Label the store's maps with concepts from a vocabulary.

    \b
    Example:
      mapstore labels --store pooled --vocab concepts.yaml
    """
    if old_inherit:
        click.echo("note: 'labels --with-broader' is now 'labels --inherit'", err=True)
        inherit = True if inherit is None else inherit
    report = label_store(store, vocab, inherit_broader=inherit)
    click.echo(report.summary())


@cli.command("export")
@STORE_OPTION
@click.option("--out", required=True, type=click.Path(file_okay=False), help="Folder to write.")
@click.option("--where", help="SQL predicate over maps and participants' columns.")
@click.option("--concept", "concepts", multiple=True, help="Keep maps labelled with this concept (repeatable).")
@click.option("--task", "tasks", multiple=True, help="Keep maps of this task (repeatable).")
@click.option("--stat", "stats", multiple=True, help="Keep maps of this stat (repeatable).")
@click.option("--features", "feature_set", help="Feature set name (default: the default set).")
@click.option("--min-coverage", type=MIN_COVERAGE.click_type(), help="Drop maps covering less of the mask.")
@click.option("--y-from", "--target", "y_from", default=None,
              help="What y is made from: contrast (default without labels options), study-contrast (each study's names apart), "
                   "concept (one per map), concepts (multi-label), or a maps or participants column.")
@click.option("--group-by", default="study", show_default=True,
              help="study, site, lab, subject, dataset, a maps or participants column, or metadata:KEY "
                   "(a sidecar field, e.g. metadata:ManufacturersModelName).")
@click.option("--scheme", default="leave-one-group-out", show_default=True,
              help="leave-one-group-out | group-kfold:K | repeated-group-kfold:K:R | stratified-group-kfold:K | "
                   "within-study-group-kfold:K | holdout:FRACTION")
@click.option("--seed", type=int, default=0, show_default=True,
              help="Random seed of shuffled schemes (holdout, stratified and repeated group k-folds).")
@click.option("--allow-leak", is_flag=True, help="Accept a split that leaks (with a warning).")
@click.option("--participant-column", "participant_columns", multiple=True,
              help="Add this participants.tsv column to meta.parquet (repeatable; personal data; default: none).")
@click.option("--one-stat/--every-stat", default=True, show_default=True,
              help="One stat per subject and contrast (z, else t, F, p, effect, variance), or every stat.")
@click.option("--per-subject", type=PER_SUBJECT_RULE.click_type(), default="contrast", show_default=True,
              help="One map per subject and contrast (subject-level map, else first session and run), one per "
                   "subject, or every map.")
@LEVEL_OPTION
@click.option("--allow-unseen", is_flag=True, help="Accept test classes training never saw (recorded in the "
              "manifest).")
@click.option("--near-copy-r", type=NEAR_COPY.click_type(), default=None,
              help="Refuse maps on both sides whose rows correlate at least this much (default: 0.9).")
@click.option("--with-inherited", "--with-broader", "with_broader", is_flag=True,
              help="Take maps whose inherited labels (written by 'labels --inherit') name a --concept, as well "
                   "as maps labelled with it directly.")
@click.option("--missing", type=MISSING.click_type(), default="common", show_default=True,
              help="Voxels some selected map has no value for: keep only voxels every map covers (common), "
                   "fill 0, or keep NaN.")
@click.option("--min-voxels", type=MIN_VOXELS.click_type(), help="With --missing common, refuse when fewer remain "
              "(default: 1% of the mask).")
@click.option("--format", "fmt", type=EXPORT_FORMAT.click_type(), default="npy", show_default=True,
              help="X as a memory-mappable .npy, one Parquet table, or a Zarr v3 array (chunks of rows).")
@click.option("--overwrite", is_flag=True, help="Replace an existing export folder.")
def export_cmd(store, out, where, concepts, tasks, stats, feature_set, min_coverage, y_from, group_by, scheme,
               seed, allow_leak, participant_columns, one_stat, per_subject, level, allow_unseen, near_copy_r,
               with_broader, missing, min_voxels, fmt, overwrite) -> None:
    """Export X, y, groups, splits and metadata of a selection, with a manifest.

    \b
    Example:
      mapstore export --store pooled --concept reading --concept listening --out reading-vs-listening
    """
    st = open_store(store)
    if y_from is None:
        y_from = "concept" if concepts else "contrast"
    sel = st.select(where, concepts=list(concepts) or None, task=list(tasks) or None, stat=list(stats) or None,
                    features=feature_set, min_coverage=min_coverage, y_from=y_from, group_by=group_by,
                    with_broader=with_broader, missing=missing, min_voxels=min_voxels, one_stat=one_stat,
                    per_subject=per_subject, level=list(level))
    report = st.export(out, sel, scheme=scheme, seed=seed, allow_leak=allow_leak, fmt=fmt, overwrite=overwrite,
                       near_copy_r=near_copy_r, allow_unseen=allow_unseen,
                       participant_columns=list(participant_columns) or None)
    if participant_columns:
        click.echo(f"note: meta.parquet holds participant columns ({', '.join(participant_columns)}): personal "
                   "data under the studies' ethics approval", err=True)
    click.echo(report.summary())


@cli.command("schema")
@click.argument("name", required=False)
def schema_cmd(name) -> None:
    """Print the JSON Schema of a file format (vocabulary, name-rules, origins, maps, ...); no NAME lists them.

    \b
    Example:
      mapstore schema vocabulary
    """
    names = schema_names()
    if name is None:
        click.echo("\n".join(names))
        return
    if name not in names:
        raise click.BadParameter(f"no schema {name!r}; schemas: {', '.join(names)}", param_hint="NAME")
    click.echo(schema_text(name), nl=False)


@cli.command("similar")
@STORE_OPTION
@click.argument("query")
@click.option("--features", "feature_set", help="Feature set name (default: the default set).")
@click.option("-k", "k", type=TOP_K.click_type(), default=10, show_default=True, help="How many maps to list.")
@click.option("--absolute", is_flag=True, help="Rank by absolute r (a sign-flipped map counts as similar).")
@click.option("--stat", help="A new map's statistic (t, z, p, F, effect, ...), when the set converts to z.")
@click.option("--dof", type=float, help="A new t or F map's degrees of freedom.")
@click.option("--format", "fmt", type=click.Choice(["table", "csv", "json"]), default="table", show_default=True,
              help="Output format.")
def similar_cmd(store, query, feature_set, k, absolute, stat, dof, fmt) -> None:
    """List the maps most similar to QUERY: a map id of the feature set, or a new map's file.

    \b
    Example:
      mapstore similar --store pooled new-map.nii.gz --stat t --dof 60
    """
    import pyarrow as pa

    options = {"dof": dof} if dof is not None else {}
    df = open_store(store).similar(query, k, features=feature_set, absolute=absolute, stat=stat, **options)
    df["r"] = df["r"].round(4)
    df["coverage"] = df["coverage"].round(3)
    write_table(pa.Table.from_pandas(df, preserve_index=False), fmt, None)


@cli.command("pool")
@STORE_OPTION
@click.option("--out", required=True, type=click.Path(file_okay=False), help="Folder for the maps and peaks.")
@click.option("--concept", "concepts", multiple=True, help="Pool the maps labelled with this concept (repeatable).")
@click.option("--task", "tasks", multiple=True, help="Pool the maps of this task (repeatable).")
@click.option("--where", help="SQL predicate over maps and participants' columns choosing the maps.")
@click.option("--stat", "stats", multiple=True, default=POOLABLE, show_default=True,
              help="Which maps to pool (repeatable): of each subject's maps of a contrast, the first of these it "
                   "has; a study's maps must be one stat.")
@click.option("--features", "feature_set", help="Feature set name (default: the default set).")
@click.option("--method", type=POOL_METHOD.click_type(), default=POOL_DEFAULT, show_default=True,
              help="How study maps are combined, voxel by voxel: stouffer (each study's one-sample z; holds its "
                   "false-positive rate on null studies), fixed or random effects of effect maps (random: "
                   "DerSimonian-Laird; random-hksj: with the Hartung-Knapp-Sidik-Jonkman variance and a t "
                   "reference; random-reml: restricted maximum likelihood).")
@click.option("--min-subjects", type=MIN_SUBJECTS.click_type(), default=3, show_default=True,
              help="A study's map is missing where fewer of its subjects have a value.")
@click.option("--min-studies", type=MIN_STUDIES.click_type(), default=2, show_default=True,
              help="The pooled map is missing where fewer studies have a value.")
@click.option("--fdr", "fdr_q", type=FDR_Q.click_type(), default=0.05,
              show_default=True, help="False discovery rate for the threshold (Benjamini-Hochberg).")
@click.option("--leave-one-out", is_flag=True, help="Also say how much each study moves the result.")
@click.option("--use-variance", is_flag=True,
              help="Weight each subject's effect map by its own variance map (same name, stat-variance).")
@LEVEL_OPTION
@click.option("--overwrite", is_flag=True, help="Replace a folder an earlier pool or export wrote.")
def pool_cmd(store, out, concepts, tasks, where, stats, feature_set, method, min_subjects, min_studies, fdr_q,
             leave_one_out, use_variance, level, overwrite) -> None:
    """Do the studies agree, and where? Study maps of the chosen maps, combined across studies.

    \b
    Example:
      mapstore pool --store pooled --concept reading --out reading-pooled
    """
    import numpy as np

    from .analyses import pool, write_pooled

    st = open_store(store)
    sel = st.select(where, concepts=list(concepts) or None, task=list(tasks) or None, stat=list(stats) or None,
                    features=feature_set, y_from="concepts", missing="keep", level=list(level))
    res = pool(sel, method, min_subjects=min_subjects, min_studies=min_studies, leave_one_out=leave_one_out,
               use_variance=use_variance)
    prov = write_pooled(res, out, fdr_q, overwrite=overwrite)
    tested = prov.fdr["n_tested"]
    thr = prov.fdr["z_threshold"]
    above = int(np.sum(res.z >= thr)) if thr is not None else 0
    k = len(res.studies)
    click.echo(f"pooled {_plural(len(sel), 'map')} of {_plural(k, 'study', 'studies')} ({method}); "
               f"{_plural(tested, 'voxel')} tested")
    click.echo(f"FDR q={fdr_q:g}: z >= {thr:.2f}, {_plural(above, 'voxel')}" if thr is not None else
               f"FDR q={fdr_q:g}: no voxel survives")
    if res.i2 is not None and np.isfinite(res.i2).any():
        click.echo(f"between-study heterogeneity I^2: median {float(np.nanmedian(res.i2)):.2f}")
    for reason, n in prov.details.get("left_out", {}).items():
        click.echo(f"  {reason}: {n['values']:,} value(s) at {_plural(n['voxels'], 'voxel')}")
    if sel.dropped:
        click.echo("  not pooled: " + "; ".join(f"{why} x{n}" for why, n in sel.dropped.items()))
    for p in res.peaks(5, threshold=thr):
        click.echo(f"  peak z {p['z']:.2f} at {p.get('mm', p['position'])} ({_plural(p['n_studies'], 'study', 'studies')})")
    click.echo(f"wrote {_plural(len(prov.files), 'file')} to {out}")


@cli.command("rebuild")
@click.argument("manifest", type=click.Path(exists=True))
@click.option("--sources", multiple=True, required=True, type=click.Path(exists=True, file_okay=False),
              help="A folder holding the source datasets (repeatable): they may have moved.")
@click.option("--out", required=True, type=click.Path(file_okay=False), help="Folder for the rebuilt export.")
@click.option("--store", "store", type=click.Path(file_okay=False), help="Store to index into (default: a new "
              "temporary one).")
@click.option("--rules", multiple=True, help="Name rules to index with instead of those the manifest kept "
              "(repeatable; files or presets).")
@click.option("--origins", type=click.Path(dir_okay=False),
              help="Origins file to index with instead of the one the manifest kept.")
@click.option("--fetch", is_flag=True, help="Fetch the manifest's maps that are annexed and not fetched (and "
              "nothing else); without it they are named.")
def rebuild_cmd(manifest, sources, out, store, rules, origins, fetch) -> None:
    """Rebuild an export from its MANIFEST and the source datasets; exit 3 if X is not the same, row by row.

    \b
    Example:
      mapstore rebuild reading-vs-listening --sources /new/place --out again
    """
    from ._rebuild import rebuild

    report = rebuild(manifest, list(sources), out, store=store, rules=list(rules) or None, origins=origins,
                     fetch=fetch)
    click.echo(report.summary())
    if not report.ok:
        raise click.exceptions.Exit(FINDINGS_EXIT)


@cli.command("verify")
@click.argument("manifest", type=click.Path(exists=True))
def verify_cmd(manifest) -> None:
    """Re-check an export's MANIFEST (or a folder 'mapstore pool' wrote) against its sources and store; exit 3
    if anything changed.

    \b
    Example:
      mapstore verify reading-vs-listening
    """
    if Path(manifest).is_dir() and (Path(manifest) / "pooled.json").exists():
        from .analyses import verify_pooled

        changes = verify_pooled(manifest)
        click.echo(f"{manifest}: pooled maps, their sources and files checked: "
                   + ("all match" if not changes else f"{len(changes)} change(s)"))
        for c in changes[:20]:
            click.echo(f"  {c}")
        if changes:
            raise click.exceptions.Exit(FINDINGS_EXIT)
        return
    report = verify_export(manifest)
    click.echo(report.summary())
    if not report.ok:
        raise click.exceptions.Exit(FINDINGS_EXIT)


@cli.command("check")
@STORE_OPTION
@click.option("--features", "feature_set", help="Feature set for coverage and value checks (default: the default set).")
@click.option("--min-coverage", type=CHECK_COVERAGE.click_type(), default=0.8, show_default=True,
              help="Report maps covering less of the mask.")
@click.option("--min-agreement", type=AGREEMENT.click_type(), default=0.2, show_default=True,
              help="Flag concepts whose per-study mean maps correlate less across studies.")
@click.option("--html", "html_out", type=click.Path(dir_okay=False), help="Write an HTML report with pictures.")
@click.option("--format", "fmt", type=click.Choice(["summary", "table", "json"]), default="summary",
              show_default=True, help="A summary, a table of every finding, or JSON.")
@click.option("--fail-on", type=click.Choice(["error", "warning", "never"]), default="error", show_default=True,
              help="Exit 3 when a finding is at this level or worse.")
def check_cmd(store, feature_set, min_coverage, min_agreement, html_out, fmt, fail_on) -> None:
    """Check grids, space, coverage, stat types, metadata, copies and concept agreement of a store.

    \b
    Example:
      mapstore check --store pooled --html check.html
    """
    _target(html_out, "--html")
    report = open_store(store).check(feature_set, min_coverage=min_coverage, pictures=bool(html_out),
                                        min_agreement=min_agreement)
    if fmt == "json":
        click.echo(report_json(report))
    elif fmt == "table":
        click.echo(text_table(report.to_table()))
    else:
        click.echo(report.summary())
    if html_out:
        click.echo(f"wrote {report.write_html(html_out, command='mapstore ' + ' '.join(sys.argv[1:]))}", err=True)
    if fail_on != "never" and report.fails(fail_on):
        raise click.exceptions.Exit(FINDINGS_EXIT)


@cli.command("demo")
@click.argument("folder", type=click.Path(file_okay=False))
@click.option("--scale", type=DEMO_SCALE.click_type(), default=1.0, show_default=True,
              help="Fraction of the demo's subjects to generate.")
def demo_cmd(folder, scale) -> None:
    """Generate the invented demo consortium in FOLDER and run the whole job on it.

    \b
    Example:
      mapstore demo ./mapstore-demo
    """
    from .demo import run_demo

    run_demo(folder, scale=scale, say=click.echo)


def _written_path(argv: list[str]) -> str | None:
    """The output folder or file, else the store, a command line names (for an error that names no file)."""
    for flag in ("--out", "--html", "--store"):
        for i, arg in enumerate(argv):
            if arg == flag and i + 1 < len(argv):
                return argv[i + 1]
            if arg.startswith(flag + "="):
                return arg.split("=", 1)[1]
    return None


def _command_of(argv: list[str]) -> click.Command | None:
    return next((cli.commands[a] for a in argv if a in cli.commands), None)


_DECLARED = re.compile(r"^[a-z_]+: ([a-z][a-z_]*) (must|is|are|gives|given)\b")
_NAMED = re.compile(r"\b([a-z][a-z0-9]*(?:_[a-z0-9]+)*)(=True\b|=False\b|=|\b)")


def cli_words(message: str, command: click.Command) -> str:
    """A message of the Python API said in ``command``'s words: a parameter's name becomes its option
    (``group_by 'scanner'`` -> ``--group-by 'scanner'``, ``with_broader=True`` -> ``--with-inherited``,
    ``select: min_coverage must`` -> ``--min-coverage must``)."""
    flags: dict[str, str] = {}
    for p in command.params:
        if isinstance(p, click.Option):
            long = [o for o in p.opts if o.startswith("--")]
            for o in long:
                flags.setdefault(o[2:].replace("-", "_"), long[0])
            if p.name and long:
                flags.setdefault(p.name, long[0])
    head = _DECLARED.match(message)
    if head and head.group(1) in flags:  # "function: name must ..." -> "--name must ..."
        message = message[message.index(": ") + 2:]

    def option(m: re.Match) -> str:
        name, tail = m.group(1), m.group(2)
        flag = flags.get(name)
        # plain words are options only when written as code would (with "_" or "="), never "store" in prose
        if flag is None or (tail == "" and "_" not in name):
            return m.group(0)
        if tail == "=True":
            return flag
        if tail == "=False":
            return "--no-" + flag[2:] if name != "with_broader" else f"without {flag}"
        return flag + (" " if tail == "=" else "")

    return _NAMED.sub(option, message)


def main(argv: list[str] | None = None) -> int:
    """Entry point: run the CLI and turn mapstore errors into messages and exit codes."""
    try:
        rv = cli.main(args=argv, prog_name="mapstore", standalone_mode=False)
    except click.exceptions.Abort:
        click.echo("aborted", err=True)
        return 1
    except click.UsageError as exc:  # one line, in the command's words, and where its help is
        where = exc.ctx.command_path if exc.ctx is not None else "mapstore"
        text = " ".join(exc.format_message().split())
        click.echo(f"error: {where}: {text} (see '{where} --help')", err=True)
        return 2
    except click.ClickException as exc:
        exc.show()
        return exc.exit_code
    except MapstoreError as exc:
        if getattr(exc, "report", None) is not None:
            click.echo(exc.report.summary())  # type: ignore[attr-defined]
        command = _command_of(argv if argv is not None else sys.argv[1:])
        click.echo(f"error: {cli_words(str(exc), command) if command is not None else exc}", err=True)
        return getattr(exc, "exit_code", 1)
    except KeyboardInterrupt:
        click.echo("interrupted", err=True)
        return 130
    except OSError as exc:  # an operating-system failure mapstore did not foresee: still one line
        named = getattr(exc, "filename", None) or _written_path(argv if argv is not None else sys.argv[1:])
        where = f"{named}: " if named else ""
        what = exc.strerror or (str(exc).splitlines() or [type(exc).__name__])[0]
        click.echo(f"error: {where}{what} (check the path, its permissions and free space)", err=True)
        return 1
    return rv if isinstance(rv, int) else 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())

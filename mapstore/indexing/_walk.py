"""The walk of one dataset: every file visited once, maps taken by the name rules, the rest reported.

Nothing here reads a map: in a git-annex repository a map file of at most 1 KiB is read only to see
whether it is the pointer an unlocked file holds until its content is fetched.
"""

from __future__ import annotations

import errno
import os
import stat
from typing import Any, Iterable

from ..formats import DATA_EXTENSIONS, data_file
from ..statkinds import stat_kind
from ..store import Problem
from ._layouts import subject_from_path

from ._names import COMPANION_SUFFIXES, DATA_HALVES, EntityParser, MAP_EXTENSIONS, NameRules, OTHER_IMAGE_EXTENSIONS, STAT_SUFFIX, _fix_labels, name_ending, split_map_name, suggested_rule
from ._datasets import DatasetInfo, MapFile, SKIP_DIRS, _is_dir
from ._annex import POINTER_MAX, annex_key_of, pointer_key, repository_of

__all__ = ['unmatched_problem', 'walk_dataset']


def _written_twice(ds: DatasetInfo, maps: list[MapFile]) -> list[Problem]:
    """A map saved both as .nii and .nii.gz (or in two cases of one name): both are kept, and said."""
    by_stem: dict[str, list[MapFile]] = {}
    for m in maps:
        ext = m.entities.get("extension") or ""
        by_stem.setdefault(m.relpath[:len(m.relpath) - len(ext)].lower(), []).append(m)
    out = []
    for group in by_stem.values():
        if len(group) > 1:
            names = ", ".join(os.path.basename(m.relpath) for m in group)
            out.append(Problem(group[0].path, "map-written-twice", f"one map written {len(group)} times in "
                               f"different formats ({names}); each is a catalog row",
                               "keep one of the files (selections keep one stat and one map per subject and "
                               "contrast, so a decoder is not fed both)", "warning", ds.key))
    return out


def walk_dataset(ds: DatasetInfo, parser: EntityParser, rules: NameRules,
                 top: Iterable[str] | None = None, root_maps: bool = True, fingerprint: Any = None,
                 skip_folders: Iterable[str] | None = None, listing_only: bool = False
                 ) -> tuple[list[MapFile], dict[str, list[str]], list[Problem]]:
    """List the statistic maps and JSON sidecars of one dataset (or of part of it).

    Returns the maps, a mapping of folder (relative, posix, "" for the root) to
    the JSON file names in it, and problems (dangling links, names that look
    like statistic maps but lack entities).  ``top`` limits the walk to some
    top-level folders and ``root_maps`` says whether maps lying in the root
    count; root-level sidecars are always collected, as inheritance needs them.
    ``fingerprint`` (a hashlib object) is fed the path, size and mtime of every file the walk visits
    (one ``stat`` each, cached by ``os.scandir``): equal digests mean the walk found the same files
    unchanged.  ``listing_only`` feeds the fingerprint and nothing else (no name is parsed, nothing
    collected): what a warm run compares before it does any other work.
    ``skip_folders`` (relative paths) are not entered: datasets of their own nested in this one.
    """
    w = _Walk(ds, parser, rules, root_maps, fingerprint)
    only = None if top is None else set(top)
    skip = set(skip_folders or ())
    stack = [""]
    seen: set[tuple[int, int]] = set()  # folders by device and inode: a symlink loop is walked once
    while stack:
        rel = stack.pop()
        folder = os.path.join(ds.root, rel) if rel else ds.root
        try:
            st = os.stat(folder)
            if (st.st_dev, st.st_ino) in seen:
                w.problems.append(Problem(folder, "symlink-loop", "a folder reached again through a symbolic "
                                          "link (a loop, or a second path to the same folder); walked once",
                                          "remove the link, or nothing to do if the folder is meant to be "
                                          "reachable twice", "warning", ds.key))
                continue
            seen.add((st.st_dev, st.st_ino))
            entries = list(os.scandir(folder))
        except OSError as exc:
            w.problems.append(Problem(folder, "unreadable-folder", f"cannot list folder ({exc.strerror})",
                                      "check permissions", "error", ds.key))
            continue
        if fingerprint is not None:  # sorted: the digest does not depend on the order the folder lists in
            entries.sort(key=lambda e: e.name)
        lowered = {e.name.lower() for e in entries}
        digits = [e.name for e in entries if e.name.isdigit() and _is_dir(e)]
        if len(digits) >= 2:  # folders named by subject number, side by side
            w.digit_dirs.update(f"{rel}/{d}" if rel else d for d in digits)
        for e in entries:
            name = e.name
            if name.startswith("."):
                continue
            relpath = f"{rel}/{name}" if rel else name
            is_dir = _is_dir(e)
            if fingerprint is not None and not is_dir:
                _feed(fingerprint, e, relpath)
            if listing_only:
                if is_dir and relpath not in skip and (rel or (name not in SKIP_DIRS and (only is None or name in only))):
                    stack.append(relpath)
                continue
            low = name.lower()
            if is_dir and low.endswith(MAP_EXTENSIONS) and "_stat-" in name:
                w.problems.append(Problem(e.path, "not-a-regular-file", "a folder named like a statistic map; it "
                                          "was not opened", "rename the folder, or put the map file itself here",
                                          "error", ds.key))
            elif is_dir:
                if relpath in skip:
                    continue
                if rel or (name not in SKIP_DIRS and (only is None or name in only)):
                    stack.append(relpath)
            elif low.endswith(".json") or low.endswith(COMPANION_SUFFIXES):
                w.companion(e, rel, relpath)
            elif low.endswith(MAP_EXTENSIONS) and (rel or root_maps):
                w.map(e, relpath)
            elif low.endswith(OTHER_IMAGE_EXTENSIONS) and (rel or root_maps):
                w.other_image(e, relpath)
            elif (half := next((d for d in DATA_HALVES if low.endswith(d)), None)) and (rel or root_maps):
                if low[:-len(half)] + DATA_HALVES[half] not in lowered:
                    w.other_image(e, relpath, half)  # a data file without its header
    w.maps.sort(key=lambda m: m.relpath)
    w.problems.extend(_written_twice(ds, w.maps))
    for ending, (n, example, ents) in sorted(w.unmatched.items()):
        w.problems.append(unmatched_problem(ds, ending, n, example, ents))
    for ending, (n, example) in sorted(w.other.items()):
        if ending in DATA_HALVES:
            w.problems.append(Problem(example, "data-without-header", f"{n} data file(s) (*{ending}) with no "
                                      f"{DATA_HALVES[ending]} header beside them: the voxels without what they "
                                      "are; passed over", f"put the {DATA_HALVES[ending]} header back beside each",
                                      "warning", ds.key, count=n))
        else:
            w.problems.append(Problem(example, "unread-format", f"{n} image file(s) in a format not read as maps "
                                      f"(*{ending}, a compressed MINC file); passed over", "uncompress it (gunzip) "
                                      "and index again", "warning", ds.key, count=n))
    return w.maps, w.jsons, w.problems


def _feed(fingerprint: Any, e: os.DirEntry, relpath: str) -> None:
    """A file's path, size and time into a walk's fingerprint (a file that cannot be stat'ed as itself)."""
    try:
        st = e.stat()
        fingerprint.update(f"{relpath}\0{st.st_size}\0{st.st_mtime_ns}\n".encode())
    except OSError:
        fingerprint.update(f"{relpath}\0?\n".encode())


def unmatched_problem(ds: DatasetInfo, ending: str, n: int, example: str,
                      entities: dict[str, str] | None = None) -> Problem:
    """One ``info`` row per kind of image file no naming took (nothing a dataset holds goes unsaid)."""
    name = os.path.basename(example)
    stem, ext = split_map_name(name) or (name, "")
    rule, what = suggested_rule(stem, ext, entities)
    if rule is None:
        remedy = f"{what}; otherwise nothing to do" if "no statistic" in what else f"{what}: nothing to do"
    else:
        remedy = (f"if they are statistic maps, rename them ..._stat-<label>_statmap, or index with a name-rules "
                  f"file (--rules) such as {rule}; it takes them as {what}; otherwise nothing to do")
    return Problem(example, "unmatched-images",
                   f"{n} image file(s) named like this one (*{ending}) are neither BIDS statistic maps "
                   "(..._stat-<label>_statmap) nor taken by a name rule; they were passed over",
                   remedy, "info", ds.key, count=n)


class _Walk:
    """What :func:`walk_dataset` collects, entry by entry."""

    def __init__(self, ds: DatasetInfo, parser: EntityParser, rules: NameRules, root_maps: bool,
                 fingerprint: Any) -> None:
        self.ds, self.parser, self.rules, self.fingerprint = ds, parser, rules, fingerprint
        self.maps: list[MapFile] = []
        self.jsons: dict[str, list[str]] = {}
        self.problems: list[Problem] = []
        self.unmatched: dict[str, list[Any]] = {}  # by name ending (_beta.nii.gz): [count, first path, entities]
        self.other: dict[str, list[Any]] = {}  # image files of formats not read, by extension: [count, first path]
        self.digit_dirs: set[str] = set()  # folders named by a number beside others so named (subject numbers)
        self._annexed: bool | None = None  # the dataset's repository uses git-annex (asked when first needed)

    @property
    def annexed(self) -> bool:
        if self._annexed is None:
            repo = repository_of(os.path.join(self.ds.root, "_"))
            git = os.path.join(repo, ".git") if repo else ""
            if git and os.path.isfile(git):  # a submodule's .git file: "gitdir: <path>"
                try:
                    with open(git, encoding="utf-8") as fh:
                        line = fh.readline(4096).strip()
                    git = os.path.join(repo, line.split(":", 1)[1].strip()) if line.startswith("gitdir:") else ""
                except OSError:
                    git = ""
            self._annexed = bool(git) and os.path.isdir(os.path.join(git, "annex"))
        return self._annexed

    def other_image(self, e: os.DirEntry, relpath: str, ext: str | None = None) -> None:
        ext = ext or next(x for x in OTHER_IMAGE_EXTENSIONS if e.name.lower().endswith(x))
        seen = self.other.setdefault(ext, [0, e.path])
        seen[0] += 1

    def companion(self, e: os.DirEntry, rel: str, relpath: str) -> None:
        """A sidecar or a model file (mask, design): listed for inheritance and model lookups."""
        try:
            _stat_entry(e)
        except _NotRegular as exc:
            self.problems.append(Problem(e.path, "not-a-regular-file", f"a {exc}, not a regular file; it was "
                                         "not opened (opening it could block)", "replace it with the file itself",
                                         "warning", self.ds.key))
            return
        except OSError:
            return  # a dangling or looping link to a sidecar: nothing to read
        self.jsons.setdefault(rel, []).append(e.name)

    def map(self, e: os.DirEntry, relpath: str) -> None:
        """A NIfTI, GIFTI or CIFTI file: a statistic map by its BIDS name or by a name rule, or nothing."""
        ds, name = self.ds, e.name
        stem, ext = split_map_name(name)  # type: ignore[misc]  # the walk passes map extensions only
        is_statmap = stem.endswith("_" + STAT_SUFFIX)
        hit = None
        if not is_statmap:
            hit = self.rules.match_full(ds.key, relpath) if self.rules.rules else None
            if hit is None and ext.lower() == ".head":  # an AFNI bucket says what each sub-brick is
                hit = (-1, {}, {})
            if hit is None:
                ending = name_ending(stem, ext)
                seen = self.unmatched.setdefault(ending, [0, e.path, None])
                if seen[0] == 0:
                    seen[2] = self.parser.parse(relpath)
                seen[0] += 1
                return
        key = annex_key_of(e.path) if e.is_symlink() else None
        st = self._stat(e, annexed=key is not None)
        present = st is not None
        if st is None:
            if key is None:
                return
            try:  # an annexed map not fetched: what the key says stands in for the file
                mtime = os.lstat(e.path).st_mtime_ns
            except OSError:
                return
            size = key.size or 0
        else:
            size, mtime = st.st_size, st.st_mtime_ns
            if key is None and size <= POINTER_MAX and self.annexed:  # an unlocked file not fetched
                key = pointer_key(e.path, size)
                if key is not None:
                    present, size = False, key.size or 0
        annex: dict[str, Any] = {"annex": key, "present": present}
        if ext.lower() in DATA_EXTENSIONS and present:  # a two-file format: its size and time are both files'
            half = data_file(e.path)
            try:
                dst = os.stat(half) if half else None
            except OSError:
                dst = None
            if dst is not None:
                size, mtime = size + dst.st_size, max(mtime, dst.st_mtime_ns)
        if is_statmap:
            ents = self.parser.parse(relpath)
            self.problems.extend(_fix_labels(stem, ents, e.path, ds.key))
            if "stat" not in ents:
                self.problems.append(Problem(e.path, "missing-entity", "statmap file name lacks stat",
                                             f"name it ..._stat-<label>_statmap{ext} (with contrast-<label> "
                                             "for a contrast's map), or add a rule in a name-rules file",
                                             "error", ds.key))
                return
            ents["extension"] = ext.lower()
            self._subject(ents, relpath)
            kind = stat_kind(ents["stat"])
            if "contrast" not in ents and ents.get("desc") and kind is not None and kind.role == "contrast":
                ents["contrast"] = ents["desc"]
                self.problems.append(Problem(e.path, "contrast-from-desc", f"a {ents['stat']} map with no contrast- "
                                             f"entity: its desc-{ents['desc']} is taken as the contrast",
                                             f"name it with contrast-{ents['desc']} to say so", "info", ds.key))
            self.maps.append(MapFile(ds, relpath, e.path, ents, size, mtime, "bids", **annex))
            return
        idx, ents, groups = hit
        base = self.parser.parse(relpath)
        base.update(ents)
        base["suffix"] = STAT_SUFFIX
        base["extension"] = ext.lower()
        self._subject(base, relpath)
        if idx < 0:  # an AFNI bucket no rule names: its header says what it holds
            base.pop("stat", None)
            self.maps.append(MapFile(ds, relpath, e.path, base, size, mtime, "afni", **annex))
            return
        extras, probs = self.rules.extras(ds.root, idx, groups, base, e.path, ds.key)
        self.problems.extend(probs)
        self.maps.append(MapFile(ds, relpath, e.path, base, size, mtime, f"rule:{idx}", extras, **annex))

    def _subject(self, ents: dict[str, str], relpath: str) -> None:
        """A subject named by a folder outside BIDS (``subj07/``, ``s07/``, a number among numbers)."""
        if "sub" not in ents:
            # a folder of maps outside BIDS may itself be the subject's (subj07/ indexed as a dataset)
            sub = subject_from_path(relpath, self.digit_dirs)
            if sub is None and self.ds.dataset_type == "folder":
                sub = subject_from_path(f"{os.path.basename(self.ds.root)}/{relpath}")
            if sub:
                ents["sub"] = sub

    def _stat(self, e: os.DirEntry, annexed: bool = False) -> os.stat_result | None:
        """The map's stat; only a regular file passes (anything else becomes a problem, unopened, but an
        ``annexed`` link whose content is not fetched: its key says what it is)."""
        key = self.ds.key
        try:
            return _stat_entry(e)
        except _NotRegular as exc:
            self.problems.append(Problem(e.path, "not-a-regular-file", f"a {exc} named like a statistic map; it was "
                                         "not opened (opening it could block the crawl)", "replace it with the map "
                                         "file itself, or remove it", "error", key))
        except FileNotFoundError:
            if annexed:
                return None
            self.problems.append(Problem(e.path, "dangling-symlink",
                                         "symbolic link to a file that is not there (an unfetched annexed file?)",
                                         "fetch the file content (for example 'datalad get' or "
                                         "'git annex get' on it), then index again", "error", key))
        except OSError as exc:
            if exc.errno == errno.ELOOP:
                self.problems.append(Problem(e.path, "symlink-loop", "symbolic links that point at each other "
                                             "in a loop", "point the link at the map file", "error", key))
            else:
                self.problems.append(Problem(e.path, "unreadable", f"cannot stat file ({exc.strerror})",
                                             "check permissions", "error", key))
        return None


_KINDS = ((stat.S_ISFIFO, "named pipe (FIFO)"), (stat.S_ISSOCK, "socket"), (stat.S_ISCHR, "character device"),
          (stat.S_ISBLK, "block device"), (stat.S_ISDIR, "folder"))


def _kind(mode: int) -> str:
    return next((name for test, name in _KINDS if test(mode)), "special file")


def _stat_entry(entry: os.DirEntry) -> os.stat_result:
    """The entry's stat (through symlinks); only regular files pass, as opening anything else can block."""
    st = entry.stat()
    if not stat.S_ISREG(st.st_mode):
        raise _NotRegular(_kind(st.st_mode))
    return st


class _NotRegular(OSError):
    """A path that is not a regular file (a FIFO, a socket, a device or a folder)."""

"""Datasets shared through git-annex (as DataLad makes them): a file's content identity from its key,
without its content, and fetching only the maps.

A file under git-annex is a symbolic link into ``.git/annex/objects/`` (or, on an adjusted branch, an
unlocked file that holds a one-line pointer, ``/annex/objects/<key>``, until its content is fetched).
The key names the content: with the SHA256 backends (``SHA256-s<size>--<hash>``, ``SHA256E`` adding the
file's extension) it holds the file's size and SHA-256, which is what the catalog records of a file.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
from dataclasses import dataclass
from typing import Callable, Iterable

from ..store import Problem

__all__ = ["AnnexKey", "annex_key_of", "fetch_files", "parse_key", "pointer_key", "repository_of",
           "uninstalled_subdatasets"]

# backend-s<size>[-S<chunk>-C<n>]--<name>: the size field is optional for some backends
_KEY = re.compile(r"^(?P<backend>[A-Z0-9]+)(?:-s(?P<size>\d+))?(?:-[a-zA-Z]\d+)*--(?P<name>.+)$")
_POINTER = b"/annex/objects/"
POINTER_MAX = 1024  # bytes: an unlocked file not fetched holds one line naming its key
BATCH = 50  # files per 'git annex get' call


@dataclass(frozen=True)
class AnnexKey:
    """A git-annex key: its backend, the content's size (when the key says) and SHA-256 (SHA256 and
    SHA256E backends only; other backends name the content another way)."""

    key: str
    backend: str
    size: int | None
    sha256: str | None

    @property
    def known(self) -> str:
        """What the key tells of the content, for a person."""
        if self.sha256:
            return "its SHA-256 and size from the key"
        return f"its size from the key (the {self.backend} backend holds no SHA-256)" if self.size is not None \
            else f"nothing of its content (the {self.backend} backend)"


def parse_key(name: str) -> AnnexKey | None:
    """The key ``name`` (a link target's last part or a pointer's), or None if it is not one.

    >>> parse_key("SHA256E-s1024--" + "ab" * 32 + ".nii.gz").size
    1024
    >>> parse_key("MD5E-s10--0123456789abcdef0123456789abcdef.txt").sha256 is None
    True
    """
    hit = _KEY.match(name)
    if hit is None:
        return None
    backend = hit.group("backend")
    size = int(hit.group("size")) if hit.group("size") else None
    sha = None
    if backend in ("SHA256", "SHA256E"):
        digest = hit.group("name").split(".", 1)[0] if backend == "SHA256E" else hit.group("name")
        sha = digest.lower() if re.fullmatch(r"[0-9a-fA-F]{64}", digest) else None
    return AnnexKey(name, backend, size, sha)


def annex_key_of(path: str) -> AnnexKey | None:
    """The key of an annexed symbolic link (present or not), or None for anything else."""
    try:
        target = os.readlink(path)
    except OSError:
        return None
    if "/annex/objects/" not in target.replace(os.sep, "/"):
        return None
    return parse_key(os.path.basename(target))


def pointer_key(path: str, size: int) -> AnnexKey | None:
    """The key an unlocked file not yet fetched names (its whole content is ``/annex/objects/<key>``)."""
    if size > POINTER_MAX:
        return None
    try:
        with open(path, "rb") as fh:
            head = fh.read(POINTER_MAX + 1)
    except OSError:
        return None
    if not head.startswith(_POINTER):
        return None
    line = head.splitlines()[0].decode("ascii", "replace")
    return parse_key(line[len(_POINTER.decode()):])


def repository_of(path: str) -> str | None:
    """The root of the git repository holding ``path`` (a dataset or subdataset), or None."""
    folder = os.path.dirname(os.path.abspath(path))
    while True:
        if os.path.exists(os.path.join(folder, ".git")):
            return folder
        parent = os.path.dirname(folder)
        if parent == folder:
            return None
        folder = parent


def uninstalled_subdatasets(root: str) -> list[str]:
    """Subdatasets ``.gitmodules`` names under ``root`` whose folder is empty (not installed)."""
    out: list[str] = []
    f = os.path.join(root, ".gitmodules")
    try:
        with open(f, encoding="utf-8") as fh:
            text = fh.read(1 << 20)  # bounded: a file of a dataset, not of ours
    except (OSError, UnicodeDecodeError):
        return out
    for rel in re.findall(r"^\s*path\s*=\s*(.+?)\s*$", text, re.MULTILINE):
        sub = os.path.join(root, rel)
        if os.path.isdir(sub) and not os.listdir(sub):
            out.append(sub)
    return out


def _git_annex() -> str | None:
    return shutil.which("git-annex")


def fetch_files(paths: Iterable[str], say: Callable[[str], None] | None = None, dataset: str = ""
                ) -> list[Problem]:
    """Fetch the content of annexed files (``git annex get``, which checks each against its key), in
    batches per repository, telling ``say`` how far it is; a problem per file that could not be fetched."""
    by_repo: dict[str, list[str]] = {}
    for p in paths:
        repo = repository_of(p)
        if repo is not None:
            by_repo.setdefault(repo, []).append(p)
    total = sum(len(v) for v in by_repo.values())
    if not total:
        return []
    exe = _git_annex()
    if exe is None:
        return [Problem(next(iter(by_repo)), "no-git-annex", f"{total} annexed map(s) to fetch, but git-annex "
                        "is not installed", "install git-annex (Debian: apt install git-annex), or fetch the "
                        "files with DataLad, then index again", "error", dataset)]
    problems: list[Problem] = []
    done = 0
    for repo, files in sorted(by_repo.items()):
        for i in range(0, len(files), BATCH):
            batch = files[i:i + BATCH]
            rel = [os.path.relpath(f, repo) for f in batch]
            run = subprocess.run(["git", "-C", repo, "annex", "get", "--json", "--json-error-messages", "--", *rel],
                                 capture_output=True, text=True)
            failed = {}
            for line in run.stdout.splitlines():
                try:
                    doc = json.loads(line)
                except ValueError:
                    continue
                if isinstance(doc, dict) and doc.get("success") is False:
                    failed[str(doc.get("file"))] = "; ".join(map(str, doc.get("error-messages") or [])) or "failed"
            if run.returncode and not failed:  # git annex refused the whole call (not a repository, ...)
                failed = {r: (run.stderr.strip().splitlines() or ["git annex get failed"])[-1] for r in rel}
            for r, why in failed.items():
                problems.append(Problem(os.path.join(repo, r), "fetch-failed", f"its content could not be "
                                        f"fetched ({why})", "check the dataset's remotes ('git annex whereis' "
                                        "on it), then index again", "error", dataset))
            done += len(batch)
            if say is not None:
                say(f"fetched {done:,} of {total:,} annexed maps")
    return problems

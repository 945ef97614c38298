"""A project as it was at a git revision, read through git without touching the working tree.

`featpipe diff` compares a revision with the working tree. Nothing here checks anything out: the
revision's files are read with `git ls-tree` and `git cat-file` and written into a temporary folder,
which `load_project` then reads like any project.

    >>> revision = resolve_revision(Path("projects/lease_default"), None)   # doctest: +SKIP
    >>> files = project_files_at(revision)                                # doctest: +SKIP
"""

from __future__ import annotations

import os
import subprocess
from dataclasses import dataclass
from fnmatch import fnmatchcase
from pathlib import Path, PurePosixPath

import yaml

from ..errors import FeatpipeError
from ..project import PROJECT_FILE

# What load_project reads (featpipe.yaml, terms/*.sql, specs/*.yaml) and the fitted files; data
# files are left out on purpose, since a diff compares definitions, never data.
DEFINITION_PATTERNS = (PROJECT_FILE, "terms/*.sql", "specs/*.yaml", "fitted/*.yaml")
DEFAULT_BRANCHES = ("main", "master")


@dataclass(frozen=True)
class Revision:
    """A resolved commit and where the project folder sits in its repository."""

    label: str  # what the user asked for, or how the default was chosen
    commit: str  # full object name
    toplevel: Path  # the repository's working-tree root
    prefix: str  # the project folder relative to `toplevel`, in POSIX form; "" at the top

    @property
    def short(self) -> str:
        return self.commit[:7]


def _git(folder: Path, *args: str, stdin: bytes | None = None) -> subprocess.CompletedProcess:
    # GIT_DIR and friends, when a hook or wrapper set them, would point git at another repository
    # than the one holding the project folder; drop them so git finds the folder's own repository.
    environment = {key: value for key, value in os.environ.items()
                   if key not in ("GIT_DIR", "GIT_WORK_TREE", "GIT_INDEX_FILE", "GIT_PREFIX")}
    try:
        return subprocess.run(["git", *args], cwd=folder, input=stdin, capture_output=True, env=environment)
    except FileNotFoundError:
        raise FeatpipeError("git is not installed or not on PATH; featpipe diff reads earlier revisions through git") from None


def _text(result: subprocess.CompletedProcess) -> str:
    return result.stdout.decode("utf-8", errors="replace").strip()


def resolve_revision(root: Path, since: str | None) -> Revision:
    """The commit to compare with: `since`, or the merge base of HEAD with the default branch
    (origin/HEAD, else main, else master), or HEAD when there is no such branch."""
    located = _git(root, "rev-parse", "--show-toplevel", "--show-prefix")
    if located.returncode != 0:
        raise FeatpipeError(
            f"{root} is not inside a git repository; featpipe diff compares the project with a git revision, "
            "so commit the project to git first (git init, git add, git commit)"
        )
    toplevel, _, prefix = located.stdout.decode("utf-8").partition("\n")
    toplevel, prefix = Path(toplevel.strip()), prefix.strip().rstrip("/")
    if since is not None:
        commit = _commit(root, since)
        if commit is None:
            raise FeatpipeError(
                f"unknown revision '{since}'; pass --since a commit, branch or tag of this repository (see git log --oneline)"
            )
        return Revision(since, commit, toplevel, prefix)
    branch = _default_branch(root)
    if branch is not None:
        base = _git(root, "merge-base", "HEAD", branch)
        if base.returncode == 0:
            return Revision(f"merge base with {branch}", _text(base), toplevel, prefix)
    commit = _commit(root, "HEAD")
    if commit is None:
        raise FeatpipeError("the repository has no commits yet; commit the project first, then run featpipe diff")
    return Revision("HEAD", commit, toplevel, prefix)


def _commit(root: Path, name: str) -> str | None:
    found = _git(root, "rev-parse", "--verify", "--quiet", "--end-of-options", f"{name}^{{commit}}")
    return _text(found) if found.returncode == 0 else None


def _default_branch(root: Path) -> str | None:
    remote = _git(root, "symbolic-ref", "--quiet", "--short", "refs/remotes/origin/HEAD")
    if remote.returncode == 0 and _text(remote):
        return _text(remote)
    for branch in DEFAULT_BRANCHES:
        if _git(root, "rev-parse", "--verify", "--quiet", f"refs/heads/{branch}").returncode == 0:
            return branch
    return None


def project_files_at(revision: Revision) -> dict[str, str] | None:
    """The project's definition and fitted files at `revision`, by path relative to the project
    folder; None when the folder held no featpipe.yaml then."""
    tree = f"{revision.commit}:{revision.prefix}" if revision.prefix else revision.commit
    listing = _git(revision.toplevel, "ls-tree", "-r", "-z", "--end-of-options", tree)
    if listing.returncode != 0:
        return None  # the project folder did not exist at that revision
    blobs: dict[str, str] = {}
    for entry in listing.stdout.decode("utf-8").split("\0"):
        if not entry:
            continue
        header, _, path = entry.partition("\t")
        mode, kind, object_name = header.split(" ")
        if kind == "blob" and mode in ("100644", "100755") and _is_definition(path):
            blobs[path] = object_name
    if PROJECT_FILE not in blobs:
        return None
    return _read_blobs(revision, blobs)


def _is_definition(path: str) -> bool:
    return any(fnmatchcase(path, pattern) and path.count("/") == pattern.count("/") for pattern in DEFINITION_PATTERNS)


def _read_blobs(revision: Revision, blobs: dict[str, str]) -> dict[str, str]:
    """Every blob in one `git cat-file --batch` call: `<name> blob <size>\\n<bytes>\\n` per object."""
    names = list(blobs)
    request = "".join(f"{blobs[name]}\n" for name in names).encode()
    result = _git(revision.toplevel, "cat-file", "--batch", stdin=request)
    if result.returncode != 0:
        raise FeatpipeError(f"git could not read the project files at {revision.label} ({revision.short}): {_text(result)}")
    output, position, files = result.stdout, 0, {}
    for name in names:
        header_end = output.index(b"\n", position)
        size = int(output[position:header_end].split(b" ")[2])
        content = output[header_end + 1: header_end + 1 + size]
        position = header_end + 1 + size + 1
        try:
            files[name] = content.decode("utf-8")
        except UnicodeDecodeError:
            raise FeatpipeError(
                f"{name} at {revision.label} ({revision.short}) is not UTF-8 text; featpipe files are UTF-8"
            ) from None
    return files


def write_project_files(files: dict[str, str], root: Path) -> None:
    """Write a revision's files under `root` so load_project can read them.

    load_project insists that each input's `load:` file exists; a diff never reads data, so an empty
    stand-in is written where that file would be (only inside `root`), instead of copying the data.
    """
    for relative, text in files.items():
        path = root / PurePosixPath(relative)
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(text, encoding="utf-8")
    try:
        inputs = (yaml.safe_load(files[PROJECT_FILE]) or {}).get("inputs") or {}
    except (yaml.YAMLError, AttributeError):
        return  # load_project reports the broken file with its position
    for spec in inputs.values() if isinstance(inputs, dict) else ():
        load = spec.get("load") if isinstance(spec, dict) else None
        if not isinstance(load, str):
            continue
        stand_in = (root / load).resolve()
        if stand_in.is_relative_to(root.resolve()) and not stand_in.exists():
            stand_in.parent.mkdir(parents=True, exist_ok=True)
            stand_in.touch()

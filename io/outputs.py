"""One overwrite rule for every command: refuse an existing output unless --force, never write over
an input, write to a temporary name and rename on success (a failed command leaves nothing behind)."""

from __future__ import annotations

import os
import shutil
import tempfile
from contextlib import contextmanager
from pathlib import Path
from typing import Iterable, Iterator

from fieldvane.io.errors import InputError


def same_path(a: str | os.PathLike, b: str | os.PathLike) -> bool:
    """Return True when a and b name the same file or folder (existing: same inode; else same resolved path)."""
    pa, pb = Path(a), Path(b)
    try:
        if pa.exists() and pb.exists():
            return os.path.samefile(pa, pb)
    except OSError:
        pass
    return pa.resolve() == pb.resolve()


def check_output(path: str | os.PathLike, *, inputs: Iterable[str | os.PathLike | None] = (),
                 force: bool = False, option: str = "--output", folder: bool = False) -> Path:
    """Return the output path after the overwrite rule; raise InputError (exit 2) naming the option.

    Refused: an output that is one of the inputs (even with --force), an output inside an input
    folder's place, an existing output without --force, a file where a folder is wanted or the
    reverse.
    """
    out = Path(path)
    for item in inputs:
        if item is None:
            continue
        if same_path(out, item):
            raise InputError("the output would overwrite an input; choose another name", str(out), column=option)
    if out.exists():
        if folder and not out.is_dir():
            raise InputError("exists and is not a folder", str(out), column=option)
        if not folder and out.is_dir():
            raise InputError("is a folder; give a file name", str(out), column=option)
        if not force:
            what = "folder" if folder else "file"
            raise InputError(f"output {what} exists (use --force to replace it)", str(out), column=option)
    parent = out.parent if str(out.parent) else Path(".")
    if parent.exists() and not parent.is_dir():
        raise InputError("the output's parent is not a folder", str(out), column=option)
    return out


def _partial_name(path: Path) -> Path:
    """Return a hidden sibling name for the partial output of path."""
    return path.with_name(f".{path.name}.partial-{os.getpid()}")


@contextmanager
def atomic_file(path: str | os.PathLike) -> Iterator[Path]:
    """Yield a temporary path beside `path`; on success rename it over `path`, on failure delete it."""
    with atomic_files([path]) as (tmp,):
        yield tmp


@contextmanager
def atomic_files(paths: Iterable[str | os.PathLike]) -> Iterator[list[Path]]:
    """Yield temporary paths for several outputs that succeed or fail together (e.g. CAL.json + CAL.npz)."""
    finals = [Path(p) for p in paths]
    for p in finals:
        try:
            p.parent.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise InputError(f"cannot create the output's folder: {exc.strerror}", str(p.parent)) from None
    tmps = [_partial_name(p) for p in finals]
    try:
        yield tmps
        for tmp, final in zip(tmps, finals):
            os.replace(tmp, final)
    except BaseException:
        for tmp in tmps:
            try:
                tmp.unlink()
            except OSError:
                pass
        raise


@contextmanager
def atomic_folder(path: str | os.PathLike) -> Iterator[Path]:
    """Yield a temporary folder beside `path`; on success it replaces `path`'s files, on failure it is removed.

    An existing folder (allowed by check_output with --force) keeps files the command did not write.
    """
    final = Path(path)
    parent = final.parent if str(final.parent) else Path(".")
    try:
        parent.mkdir(parents=True, exist_ok=True)
        tmp = Path(tempfile.mkdtemp(prefix=f".{final.name}.partial-", dir=parent))
    except OSError as exc:
        raise InputError(f"cannot create the output folder: {exc.strerror}", str(final)) from None
    try:
        yield tmp
        if not final.exists():
            os.replace(tmp, final)
        else:
            for item in sorted(tmp.rglob("*")):
                target = final / item.relative_to(tmp)
                if item.is_dir():
                    target.mkdir(parents=True, exist_ok=True)
                else:
                    target.parent.mkdir(parents=True, exist_ok=True)
                    os.replace(item, target)
            shutil.rmtree(tmp, ignore_errors=True)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise


def check_folder_outputs(written: str | os.PathLike, final: str | os.PathLike, *,
                         inputs: Iterable[str | os.PathLike | None] = (), force: bool = False,
                         option: str = "--output") -> None:
    """Apply the overwrite rule file by file before atomic_folder moves `written` (its temporary
    folder) into `final`: raise InputError naming the first file that exists there (unless force)
    or that is an input (always)."""
    written, final = Path(written), Path(final)
    inputs = [i for i in inputs if i is not None]
    for item in sorted(written.rglob("*")):
        if item.is_dir():
            continue
        target = final / item.relative_to(written)
        if any(same_path(target, i) for i in inputs):
            raise InputError("the output would overwrite an input; choose another folder", str(target),
                             column=option)
        if target.exists() and not force:
            raise InputError("output file exists (use --force to replace it)", str(target), column=option)

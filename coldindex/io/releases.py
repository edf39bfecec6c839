"""Release folders on disk: numbering, the ``latest`` pointer, verification, the lock.

The yearly update (:mod:`coldindex.release`) decides what goes into a release; this
module is the only place that finds, checks, locks, stages and publishes one.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

from coldindex.errors import BusyError, InputError, OutputError, os_error_sentence
from coldindex.io import writers

RELEASE_FORMAT = 1
RELEASE_NAME = re.compile(r"release-(\d{1,9})")
LATEST_NAME = "latest"
LOCK_NAME = ".coldindex.lock"
LOCK_WAIT_S = 3.0  # a second update waits this long for the first, then refuses


def _release_dirs(out: Path) -> dict[int, Path]:
    """``release-<n>`` folders directly inside ``out`` (links are not releases)."""
    found = {}
    for p in out.glob("release-*"):
        m = RELEASE_NAME.fullmatch(p.name)
        if m and p.is_dir() and not p.is_symlink():
            found[int(m.group(1))] = p
    return found


def release_number(out: Path) -> int:
    """The number the next release of ``out`` takes."""
    return max(_release_dirs(out), default=0) + 1


def _is_complete(rel: Path) -> bool:
    prov = rel / "provenance.json"
    return prov.is_file() and not prov.is_symlink()


def pointer_target(out: Path) -> tuple[Path | None, str]:
    """The release ``OUT/latest`` names, or None with the reason it names none.

    A missing, empty or unreadable pointer names none (the caller recovers by
    scanning); a pointer that is a folder or a link, or names anything but a
    ``release-<n>`` folder directly inside ``out``, is refused.
    """
    pointer = out / LATEST_NAME
    if not os.path.lexists(pointer):
        return None, f"{pointer} is missing"
    if pointer.is_symlink() or not pointer.is_file():
        raise InputError(f"{pointer} is not a plain file (it is a folder or a link); remove it "
                         "and run again (the newest complete release is then found by its "
                         "name).")
    try:
        text = pointer.read_bytes()[:200].decode("utf-8").strip()
    except (OSError, UnicodeDecodeError):
        return None, f"{pointer} cannot be read"
    if not text:
        return None, f"{pointer} is empty"
    if not RELEASE_NAME.fullmatch(text) or (out / text).is_symlink():
        raise InputError(f"{pointer} names {text[:60]!r}, not a release-<n> folder inside {out}; "
                         "coldindex trusts only its own releases, so remove the pointer (the "
                         "newest complete release is then found by its name) or give "
                         "--previous.")
    return out / text, ""


def _load_provenance(rel: Path) -> dict:
    path = rel / "provenance.json"
    try:
        prov = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError, RecursionError):
        prov = None
    if not isinstance(prov, dict):
        raise InputError(f"{path} is damaged (not a complete JSON object); restore the release "
                         "or give --previous with an intact one.")
    return prov


def _verify_release(rel: Path, prov: dict, used: list[str]) -> None:
    """Check every file the update reads from a release against its recorded SHA-256."""
    hashes = prov.get("outputs_sha256")
    if not isinstance(hashes, dict) or "indices.csv" not in hashes:
        raise InputError(f"{rel / 'provenance.json'} records no checksums for the release's "
                         "files; restore it or give --previous with an intact release.")
    for name in used:
        path = rel / name
        if name not in hashes:
            if os.path.lexists(path):
                raise InputError(f"{path} is not recorded in {rel / 'provenance.json'} (it was "
                                 "added after the release); remove it or give --previous.")
            continue
        if path.is_symlink() or not path.is_file():
            raise InputError(f"{path} is missing from the previous release; restore it or give "
                             "--previous with an intact release.")
        if writers.sha256_file(path) != hashes[name]:
            raise InputError(f"{path} does not match the checksum in {rel / 'provenance.json'} "
                             "(it changed since the release); restore it or give --previous "
                             "with an intact release.")


def previous_release(out: Path, previous: Path | None, used: list[str] | None = None
                      ) -> tuple[Path | None, list[str]]:
    """The release to compare with, verified, and notes on how it was found.

    ``--previous`` wins; otherwise the release ``OUT/latest`` names, unless a newer
    complete release exists (a run stopped between its rename and the pointer) or
    the pointer is lost, in which case the newest complete ``release-<n>`` is used.
    The files the update reads from it (``used``) are checked against the
    checksums of its ``provenance.json`` before any work.
    """
    notes: list[str] = []
    if previous is not None:
        if not previous.is_dir() or not _is_complete(previous):
            raise InputError(f"{previous} is not a coldindex release (no provenance.json); "
                             "give a release folder with --previous.")
        prev: Path | None = previous
    else:
        target, why = pointer_target(out)
        complete = {n: p for n, p in _release_dirs(out).items() if _is_complete(p)}
        newest = complete[max(complete)] if complete else None
        if target is not None and not _is_complete(target):
            why = f"{out / LATEST_NAME} names {target.name}, which is not a complete release"
            target = None
        if target is None:
            prev = newest
            if newest is not None:
                notes.append(f"{why}; compared with {newest.name}, the newest complete release")
        else:
            prev = target
            if newest is not None and newest != target and int(
                    newest.name.split("-")[1]) > int(target.name.split("-")[1]):
                prev = newest
                notes.append(f"{out / LATEST_NAME} named {target.name} but {newest.name} is newer "
                             "and complete (an earlier run stopped before updating the pointer); "
                             f"compared with {newest.name}")
    if prev is None:
        return None, notes
    prov = _load_provenance(prev)
    if prov.get("release_format") != RELEASE_FORMAT:
        raise InputError(f"{prev} was written by coldindex {prov.get('version', '?')} in an "
                         "incompatible release format; start a new output folder or give "
                         "--previous with a compatible release.")
    _verify_release(prev, prov, used or ["indices.csv"])
    return prev, notes




def check_out_folder(out: Path, inputs: dict[str, Path | None], previous: Path | None) -> None:
    """Refuse, before anything is created, an output folder the update must not use.

    The update writes only a new ``release-<n>`` folder, the pointer and its lock: inputs
    may sit inside ``out`` (even inside an older release) but never be one of those, nor
    ``out`` itself; ``--previous`` must be a folder and ``latest`` trustworthy.
    """
    from coldindex.io.files import same_file

    given = {k: p for k, p in inputs.items() if p is not None}
    writers.refuse_overwriting_inputs([out / LATEST_NAME, out / LOCK_NAME], given.values())
    for key, p in given.items():
        if out.exists() and same_file(out, p):
            raise InputError(f"The output folder {out} is the file of {key}; choose a folder.")
    if previous is not None and not previous.is_dir():
        raise InputError(f"--previous {previous} is not a folder; give a release folder.")
    if out.exists():
        pointer_target(out)  # refuse an untrusted pointer before creating anything


@contextmanager
def locked(out: Path) -> Iterator[None]:
    """Hold the exclusive lock of ``out`` (``out/.coldindex.lock``) for one update."""
    from filelock import FileLock, Timeout

    writers.prepare_out_dir(out)
    lock = FileLock(str(out / LOCK_NAME), timeout=LOCK_WAIT_S)
    try:
        lock.acquire()
    except Timeout:
        raise BusyError(f"Another coldindex update is writing into {out}; wait for it to "
                        "finish, then run again.") from None
    except OSError as exc:
        raise OutputError(os_error_sentence(exc, "locking", out / LOCK_NAME)) from None
    try:
        for stale in out.glob(".release-*.partial*"):  # left by a killed run
            if stale.is_dir() and not stale.is_symlink():
                shutil.rmtree(stale, ignore_errors=True)
        yield
    finally:
        lock.release()


def partial_release(out: Path, n: int) -> Path:
    """A private, uniquely named folder inside ``out`` for release ``n`` while it is built."""
    return Path(tempfile.mkdtemp(prefix=f".release-{n}.partial-", dir=out))


def publish(tmp: Path, final: Path, out: Path) -> None:
    """Rename the finished partial folder to ``release-<n>``, then point ``latest`` at it."""
    if os.path.lexists(final):
        raise OutputError(f"{final} appeared while the update ran; remove it and run again.")
    umask = os.umask(0)
    os.umask(umask)
    os.chmod(tmp, 0o777 & ~umask)  # mkdtemp made it private while it was partial
    os.rename(tmp, final)
    writers.write_bytes(f"{final.name}\n".encode(), out / LATEST_NAME)


def discard(tmp: Path) -> None:
    """Remove a partial release after a failure."""
    shutil.rmtree(tmp, ignore_errors=True)


def read_previous(rel: Path | None, name: str) -> Any:
    """A file of the previous release: JSON as a mapping, CSV as a frame, None when absent."""
    import pandas as pd

    if rel is None or not (rel / name).is_file():
        return None
    if name.endswith(".json"):
        return json.loads((rel / name).read_text(encoding="utf-8"))
    return pd.read_csv(rel / name)

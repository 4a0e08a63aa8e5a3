"""Outputs as a transaction: what roikit wrote, and replacing it as a set (private, used by every layer).

roikit writes into folders that also hold the user's own files. Three rules keep those files safe:

1. **A manifest records what roikit wrote.** Each output folder holds ``.roikit-manifest.json``: every file
   roikit wrote there (path relative to the folder, size, modification time, SHA-256), which command wrote it
   (``writer``, e.g. ``roikit run``) and, for a folder that one command owns as a whole (``roikit run``,
   ``roikit report``), that command and the identity of what it was run for (e.g. the study file). roikit only
   ever replaces or removes files its manifest lists; anything else in the folder is left alone (a user's file
   that has the very name of a new output is replaced only with consent).
2. **Re-running is the normal case; consent is for foreign folders.** A command replaces, without
   ``overwrite``, the files its manifest says it wrote (unchanged since). It needs consent (``--overwrite`` on
   the command line, ``overwrite=True`` in Python) for a folder roikit did not write for the same study (no
   manifest but other content, or a manifest of another command or study file), and for files changed since
   roikit wrote them.
3. **A set of outputs is replaced as a whole.** Everything is first written into a staging folder inside the
   output folder (``.roikit-staging-<pid>-<random>/``, same file system, so moving is a rename). Then the
   switch:

   a. the plan (files to move out, files to move in, the new manifest) is written atomically to
      ``.roikit-switch.json``: **this is the commit point**;
   b. each old file (the earlier set's own files, and files with the same names as new outputs) is renamed
      into ``.roikit-trash-<...>/``, and each new file is renamed from the staging folder into place;
   c. the new manifest is written atomically, the plan removed, trash and staging deleted.

   A crash before (a) leaves the old set untouched (plus a staging folder, removed by the next command). A
   crash during (b) or (c) leaves the plan behind: the next roikit command that writes into the folder
   finishes the switch from the plan before anything else (roll forward; every step checks what is already
   done, so finishing twice is harmless) and says so in a warning. A reader that looks in between can see
   the plan file, which marks the folder as mid-switch. So the folder holds the old set or the new set, and
   a mix only while a plan file says which set it is becoming.
4. **One writer at a time.** ``.roikit-lock`` (created exclusively, holding the process id, host and start
   time) stops a second command writing into the same folder; a lock left by a process that no longer runs
   (same host, process gone or its id reused by a younger process) is removed.

The command line calls :func:`command_line` once so that messages say ``--overwrite``; Python callers see
``overwrite=True``.
"""

from __future__ import annotations

import contextlib
import contextvars
import datetime as _dt
import hashlib
import json
import os
import secrets
import shutil
import socket
import time
import warnings
from pathlib import Path
from typing import Any, Iterable, Iterator

from .errors import (
    OutputExistsError,
    OutputLockedError,
    OutputWriteError,
    RoikitError,
    RoikitWarning,
    describe_os_error,
)

MANIFEST = ".roikit-manifest.json"
LOCK = ".roikit-lock"
PLAN = ".roikit-switch.json"
STAGING_PREFIX = ".roikit-staging-"
TRASH_PREFIX = ".roikit-trash-"
_FORMAT = 1
#: Names in an output folder that are roikit's own bookkeeping (never outputs, never the user's).
_OWN = (MANIFEST, LOCK, PLAN, ".cache")

_CLI: contextvars.ContextVar[bool] = contextvars.ContextVar("roikit_command_line", default=False)


@contextlib.contextmanager
def command_line() -> Iterator[None]:
    """Within this block, messages name command-line options (``--overwrite``) instead of Python arguments."""
    token = _CLI.set(True)
    try:
        yield
    finally:
        _CLI.reset(token)


def consent_hint() -> str:
    """``pass --overwrite`` on the command line, ``pass overwrite=True`` in Python."""
    return f"pass {consent_option()}"


def consent_option() -> str:
    """``--overwrite`` on the command line, ``overwrite=True`` in Python."""
    return "--overwrite" if _CLI.get() else "overwrite=True"


def _now() -> str:
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")


def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def _record(path: Path, writer: str, set_name: str) -> dict:
    st = os.stat(path)
    return {"size": st.st_size, "mtime_ns": st.st_mtime_ns, "sha256": _sha256(path), "writer": writer,
            "set": set_name}


def _changed(path: Path, entry: dict) -> bool:
    """True if ``path`` no longer holds what the manifest entry recorded (size, then time, then SHA-256)."""
    try:
        st = os.stat(path)
    except FileNotFoundError:
        return False  # gone: nothing of the user's to protect
    if st.st_size != entry.get("size"):
        return True
    if st.st_mtime_ns == entry.get("mtime_ns"):
        return False
    return _sha256(path) != entry.get("sha256")


def _os_error(exc: OSError, path, doing: str = "write", note: str = "") -> RoikitError:
    """One line: the path, what failed, the operating system's reason and what to do (``describe_os_error``)."""
    return OutputWriteError(describe_os_error(path, exc, action=doing) + note)


# --------------------------------------------------------------------------------------------------
# The manifest
# --------------------------------------------------------------------------------------------------


def read_manifest(folder: os.PathLike | str) -> dict | None:
    """The folder's manifest, or None when there is none. A malformed one is None with a warning.

    A folder written before manifests existed is recognised from its ``provenance.json`` (see
    :func:`_legacy_manifest`).
    """
    path = Path(folder) / MANIFEST
    try:
        with open(path, encoding="utf-8") as fh:
            data = json.load(fh)
    except FileNotFoundError:
        return _legacy_manifest(Path(folder))
    except (OSError, ValueError) as exc:
        warnings.warn(RoikitWarning(f"{path}: unreadable manifest ({exc}); the folder's files are treated as not "
                                    "written by roikit"), stacklevel=3)
        return None
    files = data.get("files") if isinstance(data, dict) else None
    if not isinstance(files, dict) or not all(isinstance(v, dict) for v in files.values()):
        warnings.warn(RoikitWarning(f"{path}: malformed manifest (no files table); the folder's files are treated "
                                    "as not written by roikit"), stacklevel=3)
        return None
    owner = data.get("owner")
    data["owner"] = owner if isinstance(owner, dict) else None
    return data


def _legacy_manifest(folder: Path) -> dict | None:
    """The manifest of a folder that an earlier roikit (before manifests) wrote, from its ``provenance.json``.

    ``roikit run`` and ``roikit report`` recorded every output with its SHA-256 there. Only the files that
    still hold those bytes count as roikit's (plus ``provenance.json`` itself); anything else is the user's.
    """
    try:
        with open(folder / "provenance.json", encoding="utf-8") as fh:
            record = json.load(fh)
    except (OSError, ValueError):
        return None
    if not isinstance(record, dict) or record.get("kind") not in ("roikit run", "roikit report") or \
            not isinstance(record.get("outputs"), list):
        return None
    files = {}
    for item in record["outputs"] + [{"path": "provenance.json", "sha256": None}]:
        rel = item.get("path") if isinstance(item, dict) else None
        if not isinstance(rel, str) or rel.startswith(("/", "..")) or not (folder / rel).is_file():
            continue
        entry = _record(folder / rel, record["kind"], "folder")
        if item.get("sha256") not in (None, entry["sha256"]):
            continue  # changed since: the user's now
        files[rel] = entry
    run = record.get("run") if isinstance(record.get("run"), dict) else {}
    identity = {"study_file": run["study_file"]} if isinstance(run.get("study_file"), str) else None
    return {**_empty_manifest(), "owner": {"writer": record["kind"], "identity": identity, "legacy": True},
            "files": files}


def _empty_manifest() -> dict:
    return {"format": _FORMAT, "note": "files roikit wrote in this folder; roikit replaces or removes only these",
            "owner": None, "files": {}}


# --------------------------------------------------------------------------------------------------
# The lock
# --------------------------------------------------------------------------------------------------


def _start_time(pid: int) -> str | None:
    """The process's start time in clock ticks since boot (Linux), to tell a reused process id apart."""
    try:
        with open(f"/proc/{pid}/stat", encoding="ascii", errors="replace") as fh:
            text = fh.read()
        return text.rsplit(")", 1)[1].split()[19]
    except (OSError, IndexError):
        return None


def _alive(holder: dict) -> bool:
    """Whether the process that wrote a lock still runs (assumed yes when that cannot be known)."""
    pid = holder.get("pid")
    if not isinstance(pid, int) or holder.get("host") != socket.gethostname():
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    started = holder.get("started_ticks")
    now = _start_time(pid)
    if started is not None and now is not None and started != now:
        return False  # the id now belongs to another process
    return True


@contextlib.contextmanager
def folder_lock(folder: os.PathLike | str, command: str, *, wait: float = 0.0) -> Iterator[Path]:
    """Hold ``folder/.roikit-lock`` for this process; refuse (after ``wait`` seconds) when another holds it."""
    folder = Path(folder)
    path = folder / LOCK
    record = {"pid": os.getpid(), "host": socket.gethostname(), "started_ticks": _start_time(os.getpid()),
              "command": command, "since": _now()}
    deadline = time.monotonic() + wait
    for _attempt in range(1000):
        try:
            fd = os.open(path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
        except FileExistsError:
            try:
                holder = json.loads(path.read_text(encoding="utf-8"))
                holder = holder if isinstance(holder, dict) else {}
            except FileNotFoundError:
                continue  # released meanwhile
            except (OSError, ValueError):
                holder = {}
                try:  # a lock being written right now is young; an unreadable old one is stale
                    if time.time() - os.stat(path).st_mtime > 10:
                        holder = {"pid": -1, "host": socket.gethostname()}
                except FileNotFoundError:
                    continue
            if holder.get("pid") == -1 or not _alive(holder):
                stale = path.with_name(f"{LOCK}.stale-{os.getpid()}-{secrets.token_hex(3)}")
                with contextlib.suppress(FileNotFoundError):
                    os.replace(path, stale)  # atomic: of two processes cleaning up, one wins
                    os.unlink(stale)
                continue
            if time.monotonic() < deadline:
                time.sleep(0.1)
                continue
            who = f"process {holder.get('pid', '?')}"
            if holder.get("host") and holder.get("host") != socket.gethostname():
                who += f" on {holder['host']}"
            raise OutputLockedError(
                f"{folder}: another roikit command ({holder.get('command', 'unknown')}, {who}, since "
                f"{holder.get('since', '?')}) is writing into this folder; wait for it to finish or choose "
                f"another output folder (remove {path} only if no such command runs)")
        except OSError as exc:
            raise _os_error(exc, folder, "create the lock file in") from exc
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            json.dump(record, fh)
        break
    else:  # pragma: no cover - a lock that keeps coming back
        raise OutputLockedError(f"{path}: cannot take the folder's lock; remove it if no roikit command runs")
    try:
        yield path
    finally:
        with contextlib.suppress(OSError):
            os.unlink(path)


# --------------------------------------------------------------------------------------------------
# Recovery and the switch
# --------------------------------------------------------------------------------------------------


def _pid_of(name: str, prefix: str) -> int | None:
    try:
        return int(name[len(prefix):].split("-", 1)[0])
    except ValueError:
        return None


def recover(folder: os.PathLike | str) -> bool:
    """Finish a switch that an earlier process left half done; remove leftovers of dead processes.

    Call while holding the folder's lock. Returns True when a switch was finished (and warns).
    """
    folder = Path(folder)
    finished = False
    plan_path = folder / PLAN
    if plan_path.exists():
        try:
            plan = json.loads(plan_path.read_text(encoding="utf-8"))
            if not isinstance(plan, dict) or not isinstance(plan.get("manifest"), dict):
                raise ValueError("not a plan")
        except (OSError, ValueError) as exc:
            raise OutputExistsError(
                f"{plan_path}: an interrupted replacement of outputs left an unreadable plan ({exc}); check the "
                f"folder's files by hand, then delete {PLAN}") from exc
        try:
            _roll_forward(folder, plan)
        except OSError as exc:
            raise _os_error(exc, folder, f"finish replacing the outputs of an interrupted earlier run (plan {PLAN}) in"
                            ) from exc
        finished = True
        warnings.warn(RoikitWarning(
            f"{folder}: finished replacing outputs that an interrupted earlier run had started "
            f"({plan.get('writer', 'roikit')}, {len(plan.get('move_in', []))} files)"), stacklevel=3)
    try:
        entries = list(os.scandir(folder))
    except FileNotFoundError:
        return finished
    for entry in entries:
        for prefix in (STAGING_PREFIX, TRASH_PREFIX):
            if entry.name.startswith(prefix) and entry.is_dir(follow_symlinks=False):
                pid = _pid_of(entry.name, prefix)
                if pid is None or pid == os.getpid() or not _alive({"pid": pid, "host": socket.gethostname()}):
                    if pid != os.getpid():
                        shutil.rmtree(entry.path, ignore_errors=True)
    return finished


def _roll_forward(folder: Path, plan: dict) -> None:
    """Carry out a switch plan; each step checks whether it is already done (safe to repeat)."""
    staging = folder / plan["staging"]
    trash = folder / plan["trash"]
    move_in = list(plan.get("move_in", []))
    incoming = set(move_in)
    touched_dirs: set[Path] = set()
    for rel in plan.get("move_out", []):
        target = folder / rel
        if rel in incoming and not (staging / rel).exists():
            continue  # the new file is already in place
        if os.path.lexists(target):
            dest = trash / rel
            dest.parent.mkdir(parents=True, exist_ok=True)
            os.replace(target, dest)
            touched_dirs.add(target.parent)
    for rel in move_in:
        src = staging / rel
        if src.exists():
            dest = folder / rel
            dest.parent.mkdir(parents=True, exist_ok=True)
            os.replace(src, dest)
    _write_json(folder / MANIFEST, plan["manifest"])
    os.unlink(folder / PLAN)
    shutil.rmtree(trash, ignore_errors=True)
    shutil.rmtree(staging, ignore_errors=True)
    for d in sorted(touched_dirs, key=lambda p: len(p.parts), reverse=True):  # folders the old set emptied
        while d != folder and folder in d.parents:
            try:
                d.rmdir()  # only when empty: a folder holding a user's file stays
            except OSError:
                break
            d = d.parent


def _write_json(path: Path, obj: Any) -> None:
    data = (json.dumps(obj, indent=1, ensure_ascii=False) + "\n").encode("utf-8")
    tmp = path.with_name(f".{path.name}.{os.getpid()}-{secrets.token_hex(3)}.tmp")
    try:
        with open(tmp, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise


def _switch(folder: Path, staging: Path, *, writer: str, set_name: str, owner: dict | None,
            replaced: Iterable[str], manifest: dict | None) -> list[Path]:
    """Move every file of ``staging`` into ``folder`` as one set (see the module docstring)."""
    new_rels = sorted(os.path.relpath(os.path.join(root, name), staging).replace(os.sep, "/")
                      for root, _, names in os.walk(staging) for name in names)
    new_manifest = json.loads(json.dumps(manifest)) if manifest is not None else _empty_manifest()
    files = new_manifest["files"]
    gone = [rel for rel in replaced]
    for rel in gone:
        files.pop(rel, None)
    for rel in new_rels:
        files[rel] = _record(staging / rel, writer, set_name)
        files[rel]["written"] = _now()
    if owner is not None:
        new_manifest["owner"] = owner
    move_out = sorted(set(gone) | {rel for rel in new_rels if os.path.lexists(folder / rel)})
    plan = {"format": _FORMAT, "writer": writer, "staging": staging.name,
            "trash": f"{TRASH_PREFIX}{os.getpid()}-{secrets.token_hex(4)}", "move_out": move_out,
            "move_in": new_rels, "manifest": new_manifest}
    _write_json(folder / PLAN, plan)  # the commit point
    _roll_forward(folder, plan)
    return [folder / rel for rel in new_rels]


def _staging(folder: Path) -> Path:
    path = folder / f"{STAGING_PREFIX}{os.getpid()}-{secrets.token_hex(4)}"
    path.mkdir()
    return path


def _listing(names: list[str], limit: int = 4) -> str:
    return ", ".join(names[:limit]) + (f" and {len(names) - limit} more" if len(names) > limit else "")


# --------------------------------------------------------------------------------------------------
# A folder owned by one command (roikit run, roikit report)
# --------------------------------------------------------------------------------------------------


def _same_owner(owner: dict | None, writer: str, identity: dict | None, match: tuple[str, ...]) -> bool:
    if not owner or owner.get("writer") != writer:
        return False
    if not match:
        return True
    old = owner.get("identity") or {}
    new = identity or {}
    return any(old.get(k) is not None and old.get(k) == new.get(k) for k in match)


def _foreign_content(folder: Path) -> list[str]:
    try:
        return sorted(e.name for e in os.scandir(folder) if e.name not in _OWN
                      and not e.name.startswith((STAGING_PREFIX, TRASH_PREFIX, f"{LOCK}.")))
    except FileNotFoundError:
        return []


def check_folder(folder: os.PathLike | str, *, writer: str, identity: dict | None = None,
                 match: tuple[str, ...] = (), overwrite: bool = False, what: str = "") -> None:
    """Raise :class:`OutputExistsError` unless ``writer`` may write its outputs into ``folder``.

    Allowed without ``overwrite``: a missing or empty folder (roikit's bookkeeping aside), or one whose manifest
    says ``writer`` owns it for the same ``identity`` (any key of ``match`` equal) and whose listed files are
    unchanged since.
    """
    folder = Path(folder)
    if folder.exists() and not folder.is_dir():
        raise OutputExistsError(f"{folder}: exists and is not a folder; choose another output folder")
    if overwrite or not folder.exists():
        return
    manifest = read_manifest(folder)
    owner = manifest.get("owner") if manifest else None
    foreign = _foreign_content(folder)
    if not foreign:
        return
    if not _same_owner(owner, writer, identity, match):
        if owner is None:
            why = f"holds files roikit did not write ({_listing(foreign)})"
        else:
            was = owner.get("identity") or {}
            label = was.get("study_file") or was.get("label")
            why = (f"holds the outputs of {owner.get('writer', 'another command')}"
                   + (f" for {label}" if label else "") + (f", not of {what}" if what else ""))
        raise OutputExistsError(
            f"{folder}: {why}; {consent_hint()} to write there anyway (other files are kept unless an output has "
            "their name), or choose another output folder")
    changed = [rel for rel, e in manifest["files"].items()
               if e.get("set") == "folder" and _changed(folder / rel, e)]
    if changed:
        raise OutputExistsError(
            f"{folder}: {_listing(changed)} changed since roikit wrote {'them' if len(changed) > 1 else 'it'}; "
            f"move {'them' if len(changed) > 1 else 'it'} elsewhere to keep the changes, or {consent_hint()} to "
            "replace them")


class FolderOutputs:
    """Write a whole set of outputs into a folder as one transaction (see the module docstring).

    Examples
    --------
    >>> with FolderOutputs(out, writer="roikit report") as tx:        # doctest: +SKIP
    ...     write_everything(tx.staging)
    ...     paths = tx.commit()
    """

    def __init__(self, folder: os.PathLike | str, *, writer: str, identity: dict | None = None,
                 match: tuple[str, ...] = (), overwrite: bool = False, what: str = ""):
        self.folder = Path(folder)
        self.writer = writer
        self.identity = identity
        self.match = match
        self.overwrite = overwrite
        self.what = what
        self.staging: Path | None = None
        self.recovered = False
        self._lock = None
        self._committed = False

    def __enter__(self) -> "FolderOutputs":
        check_folder(self.folder, writer=self.writer, identity=self.identity, match=self.match,
                     overwrite=self.overwrite, what=self.what)  # before making anything
        try:
            self.folder.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise _os_error(exc, self.folder, "create the output folder") from exc
        self._lock = folder_lock(self.folder, self.writer)
        self._lock.__enter__()
        try:
            self.recovered = recover(self.folder)
            check_folder(self.folder, writer=self.writer, identity=self.identity, match=self.match,
                         overwrite=self.overwrite, what=self.what)
            self.staging = _staging(self.folder)
        except BaseException:
            self._lock.__exit__(None, None, None)
            raise
        return self

    def commit(self) -> list[Path]:
        """Switch the staged files in as the new set; the earlier set's own files are removed."""
        manifest = read_manifest(self.folder)
        owner_before = manifest.get("owner") if manifest else None
        own = _same_owner(owner_before, self.writer, self.identity, self.match)
        old = [rel for rel, e in (manifest or {"files": {}})["files"].items() if e.get("set") == "folder"]
        new_rels = [os.path.relpath(os.path.join(root, name), self.staging).replace(os.sep, "/")
                    for root, _, names in os.walk(self.staging) for name in names]
        listed = (manifest or {"files": {}})["files"]
        clash = [rel for rel in new_rels if os.path.lexists(self.folder / rel)
                 and (rel not in listed or (listed[rel].get("set") != "folder"
                                            and listed[rel].get("writer") != self.writer))]
        if not self.overwrite:
            if clash:
                raise OutputExistsError(
                    f"{self.folder}: {_listing(clash)} {'were' if len(clash) > 1 else 'was'} not written by roikit "
                    f"but {'have' if len(clash) > 1 else 'has'} the name of a new output; move "
                    f"{'them' if len(clash) > 1 else 'it'} elsewhere or {consent_hint()} to replace "
                    f"{'them' if len(clash) > 1 else 'it'}")
            changed = [rel for rel in old if _changed(self.folder / rel, listed[rel])] if own else []
            if changed:
                raise OutputExistsError(
                    f"{self.folder}: {_listing(changed)} changed while roikit ran; move "
                    f"{'them' if len(changed) > 1 else 'it'} elsewhere or {consent_hint()} to replace them")
        owner = {"writer": self.writer, "identity": self.identity, "written": _now()}
        try:
            paths = _switch(self.folder, self.staging, writer=self.writer, set_name="folder", owner=owner,
                            replaced=old, manifest=manifest)
        except OSError as exc:
            self._committed = (self.folder / PLAN).exists()
            raise _os_error(exc, self.folder, "replace the outputs in",
                            "; the next roikit run into this folder finishes it" if self._committed else "") from exc
        self._committed = True
        return paths

    def __exit__(self, exc_type, exc, tb) -> None:
        try:
            if self.staging is not None and not (self.folder / PLAN).exists():
                shutil.rmtree(self.staging, ignore_errors=True)
        finally:
            self._lock.__exit__(None, None, None)


# --------------------------------------------------------------------------------------------------
# Single files (roikit extract, roikit stats: a table and its sidecar)
# --------------------------------------------------------------------------------------------------


def check_files(paths: Iterable[os.PathLike | str], *, writer: str, overwrite: bool = False) -> None:
    """Raise :class:`OutputExistsError` unless ``writer`` may (re)write these files.

    Allowed without ``overwrite``: files that do not exist, and files the folder's manifest says ``writer``
    wrote and that are unchanged since.
    """
    if overwrite:
        return
    blocked: list[Path] = []
    manifests: dict[Path, dict | None] = {}
    for p in map(Path, paths):
        if not os.path.lexists(p):
            continue
        folder = p.parent
        if folder not in manifests:
            manifests[folder] = read_manifest(folder)
        entry = (manifests[folder] or {"files": {}})["files"].get(p.name)
        if entry is None or entry.get("writer") != writer or _changed(p, entry):
            blocked.append(p)
    if blocked:
        first = blocked[0]
        also = f" (and {', '.join(b.name for b in blocked[1:])})" if len(blocked) > 1 else ""
        raise OutputExistsError(
            f"{first}{also}: file exists and is not an unchanged output of {writer}; {consent_hint()} to replace "
            "it, or choose another path")


def write_files(folder: os.PathLike | str, files: dict[str, bytes], *, writer: str, overwrite: bool = False,
                wait: float = 30.0) -> list[Path]:
    """Write several files into ``folder`` as one set (all or none), recording them in the manifest.

    Parameters
    ----------
    folder : path
    files : dict of str to bytes or callable
        File name (inside ``folder``) -> content, or a callable writing the content into the open binary file
        (streamed: called in order, before the switch, so a failure leaves the folder as it was).
    writer : str
        The command writing them (e.g. ``"roikit extract"``).
    overwrite : bool
        Replace files that are not unchanged outputs of ``writer``.
    wait : float
        Seconds to wait for another roikit command that holds the folder's lock.
    """
    folder = Path(folder)
    check_files([folder / name for name in files], writer=writer, overwrite=overwrite)
    try:
        folder.mkdir(parents=True, exist_ok=True)
        staging = _staging(folder)
    except OSError as exc:
        raise _os_error(exc, folder) from exc
    try:
        try:
            for name, data in files.items():
                with open(staging / name, "wb") as fh:
                    if callable(data):  # streamed: the callable writes the content into the open file
                        data(fh)
                    else:
                        fh.write(data)
                os.chmod(staging / name, 0o666 & ~_umask())
        except RoikitError:  # raised by a streaming callable (e.g. a map that cannot be read): passed on as is
            raise
        except OSError as exc:
            raise _os_error(exc, folder / next(iter(files))) from exc
        with folder_lock(folder, writer, wait=wait):
            recover(folder)
            check_files([folder / name for name in files], writer=writer, overwrite=overwrite)
            manifest = read_manifest(folder)
            try:
                return _switch(folder, staging, writer=writer, set_name=sorted(files)[0], owner=None,
                               replaced=[], manifest=manifest)
            except OSError as exc:
                pending = (folder / PLAN).exists()
                raise _os_error(exc, folder / ", ".join(files), note=(
                    "; the next roikit command writing there finishes replacing them" if pending else "")) from exc
    finally:
        if not (folder / PLAN).exists():
            shutil.rmtree(staging, ignore_errors=True)


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


__all__ = ["MANIFEST", "LOCK", "PLAN", "command_line", "consent_hint", "consent_option", "read_manifest", "folder_lock", "recover",
           "check_folder", "FolderOutputs", "check_files", "write_files"]

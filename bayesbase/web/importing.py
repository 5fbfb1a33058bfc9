"""Import through the desk: an upload is staged aside (never in the store), compared with the
store by the store's own plan (``Store.import_file(dry_run=True)``, the same as
``bayesbase import --dry-run``), shown with every validation problem (file, row, column), and
written only when confirmed, in the store's one transaction. A staged upload is confirmed at
most once; it is removed once imported and after an hour unused."""
from __future__ import annotations

import re
import secrets
import shutil
import tempfile
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path

from ..errors import BayesbaseError, ValidationError
from .config import DeskError

__all__ = ["ALLOWED_SUFFIXES", "Staged", "Staging", "Outcome", "dry_run", "confirm",
           "safe_file_name"]

#: file kinds the store imports: tidy tables (CSV/TSV/text), XLSX, FHIR R4 Bundle in JSON
ALLOWED_SUFFIXES = (".csv", ".tsv", ".txt", ".xlsx", ".json")
#: seconds a staged upload is kept unconfirmed
STAGED_TTL_S = 3600


def safe_file_name(name: str) -> str:
    """The upload's own file name (it names the file in problems and in the import log), with
    any folder part and any character outside letters, digits, space and ``._-()`` replaced."""
    base = re.split(r"[\\/]", str(name or ""))[-1].strip()
    base = re.sub(r"[^\w .()-]", "_", base).strip(" .") or "upload"
    return base[:120]


@dataclass(frozen=True)
class Staged:
    uid: str
    path: Path
    name: str
    size: int
    created: float = field(default_factory=time.monotonic)


class Staging:
    """Uploads waiting for confirmation, each in its own folder under ``root``."""

    def __init__(self, root: Path | None = None):
        self.root = Path(root) if root else Path(tempfile.mkdtemp(prefix="bayesbase-desk-"))
        self.root.mkdir(parents=True, exist_ok=True)
        self._items: dict[str, Staged] = {}
        self._lock = threading.Lock()

    def new_path(self, name: str) -> tuple[str, Path]:
        name = safe_file_name(name)
        if Path(name).suffix.lower() not in ALLOWED_SUFFIXES:
            raise DeskError(400, "File type not imported",
                            f"{name}: choose a CSV, TSV, XLSX or FHIR JSON file "
                            f"({', '.join(ALLOWED_SUFFIXES)})")
        uid = secrets.token_urlsafe(16)
        folder = self.root / uid
        folder.mkdir()
        return uid, folder / name

    def add(self, uid: str, path: Path) -> Staged:
        self.expire()
        staged = Staged(uid, path, path.name, path.stat().st_size)
        with self._lock:
            self._items[uid] = staged
        return staged

    def get(self, uid: str) -> Staged | None:
        with self._lock:
            return self._items.get(str(uid))

    def take(self, uid: str) -> Staged | None:
        """Remove and return a staged upload (None when unknown, taken or expired)."""
        with self._lock:
            return self._items.pop(str(uid), None)

    def put_back(self, staged: Staged) -> None:
        with self._lock:
            self._items[staged.uid] = staged

    def discard(self, staged: Staged) -> None:
        with self._lock:
            self._items.pop(staged.uid, None)
        shutil.rmtree(staged.path.parent, ignore_errors=True)

    def expire(self, now: float | None = None) -> None:
        now = time.monotonic() if now is None else now
        with self._lock:
            old = [s for s in self._items.values() if now - s.created > STAGED_TTL_S]
        for s in old:
            self.discard(s)

    def close(self) -> None:
        shutil.rmtree(self.root, ignore_errors=True)


@dataclass(frozen=True)
class Outcome:
    """What a dry run or an import gave: a summary, or the problems, conflicts or error that
    stopped it (then nothing was stored)."""

    staged: Staged
    summary: object = None
    problems: tuple = ()
    conflicts: tuple = ()
    error: str | None = None

    @property
    def ok(self) -> bool:
        return self.summary is not None and not self.problems and self.error is None


def _run(db, staged: Staged, **kw) -> Outcome:
    from ..store import ImportConflict, Store

    try:
        with Store(db) as st:
            summary = st.import_file(staged.path, **kw)
    except ValidationError as exc:
        return Outcome(staged, problems=tuple(exc.problems))
    except ImportConflict as exc:
        return Outcome(staged, conflicts=tuple(exc.conflicts), error=str(exc).splitlines()[0])
    except BayesbaseError as exc:
        return Outcome(staged, error=str(exc))
    return Outcome(staged, summary=summary, conflicts=tuple(summary.conflicts))


def dry_run(db, staged: Staged) -> Outcome:
    """What importing the staged file would do; nothing is written."""
    return _run(db, staged, dry_run=True)


def confirm(db, staging: Staging, uid: str, replace: bool) -> Outcome:
    """Import a staged upload once. An upload already imported (or expired) is refused (409);
    one refused for conflicts stays staged so it can be confirmed with ``replace``."""
    staged = staging.take(uid)
    if staged is None:
        raise DeskError(409, "Nothing to import",
                        "this upload was already imported, or it expired; upload the file again")
    outcome = _run(db, staged, replace=replace)
    if outcome.conflicts and outcome.summary is None:
        staging.put_back(staged)
    else:
        staging.discard(staged)
    return outcome

"""The QA-edit journal: analyst corrections appended to a JSON-lines file beside the scene.

Every edit is one line, written with ``flush`` and ``fsync`` before the call returns, so an
edit survives a closed browser, a restarted server or a killed process. Undo is itself an
entry (it names the edit it cancels), so the file is only ever appended to. Replaying the
file in order gives the current overrides. A torn last line (a write cut short by a crash)
is detected, reported and left out; everything before it is kept.

Line format::

    {"id": 3, "time": "2026-12-01T17:02:13Z", "action": "cloud", "count": 42, "index": [...]}
    {"id": 4, "time": "...", "action": "undo", "target": 3}
"""
import datetime as _dt
import json
import os
from pathlib import Path
import threading

from .codes import EDIT_CODES
from .errors import CloudsieveError

ACTIONS = tuple(EDIT_CODES)  # the edit actions: clear, cloud, reset


def journal_path(scene_path):
    """The journal file that belongs to a scene file: ``<scene>.qa.jsonl`` beside it."""
    p = Path(scene_path)
    return p.with_name(p.name + ".qa.jsonl")


class JournalError(CloudsieveError):
    exit_code = 2


class StaleEditsError(JournalError):
    """The journal changed under a caller acting on an older view of it."""


class Journal:
    """Append-only journal of QA edits for one scene.

    Parameters
    ----------
    path : str or Path
        The journal file (created on the first edit).
    n_pixels : int
        Number of grid positions of the scene (indices are checked against it).
    """

    def __init__(self, path, n_pixels):
        self.path = Path(path)
        self.n_pixels = int(n_pixels)
        self.entries = []
        self.problems = []
        self._size = 0  # bytes of the file this object has read or written
        self._lock = threading.RLock()
        self._load()

    def _load(self):
        if not self.path.exists():
            return
        raw = self.path.read_bytes()
        lines = raw.split(b"\n")
        for k, line in enumerate(lines):
            if not line.strip():
                continue
            try:
                entry = json.loads(line.decode("utf-8"))
                if not isinstance(entry, dict) or "action" not in entry or "id" not in entry:
                    raise ValueError("not an edit entry")
            except (ValueError, UnicodeDecodeError):
                last = all(not rest.strip() for rest in lines[k + 1:])
                what = "torn last line (an edit interrupted while being written)" if last else f"unreadable line {k + 1}"
                self.problems.append(f"QA journal {self.path.name}: {what} left out")
                continue
            why = self._invalid(entry)
            if why:
                self.problems.append(f"QA journal {self.path.name}: line {k + 1} left out ({why}); if the scene was "
                                     "regenerated with another grid, move the old journal away")
                continue
            self.entries.append(entry)
        if raw and not raw.endswith(b"\n"):
            # make the next append start on a fresh line
            with open(self.path, "ab") as fh:
                fh.write(b"\n")
                fh.flush()
                os.fsync(fh.fileno())
        self._size = self.path.stat().st_size

    def _invalid(self, entry):
        """Why a parsed journal entry cannot be applied to this scene (None: it can)."""
        if not isinstance(entry["id"], int):
            return "its id is not a whole number"
        if entry["action"] == "undo":
            return None if isinstance(entry.get("target"), int) else "an undo without the edit it cancels"
        if entry["action"] not in ACTIONS:
            return f"unknown action {entry['action']!r}"
        index = entry.get("index")
        if not isinstance(index, list) or not all(isinstance(i, int) for i in index):
            return "no list of pixel indices"
        if index and (min(index) < 0 or max(index) >= self.n_pixels):
            return f"pixel indices outside this scene's 0–{self.n_pixels - 1}"
        return None

    def _refresh(self):
        """Read the file again if another writer (a second dashboard session on the same
        scene, the CLI) appended to it since, so ids stay unique and edits are not lost."""
        try:
            size = self.path.stat().st_size
        except FileNotFoundError:
            size = 0
        if size != self._size:
            self.entries, self.problems, self._size = [], [], 0
            self._load()

    def _append(self, entry):
        data = (json.dumps(entry, separators=(",", ":")) + "\n").encode("utf-8")
        fd = os.open(self.path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)
        try:
            os.write(fd, data)
            os.fsync(fd)
            self._size = os.fstat(fd).st_size
        finally:
            os.close(fd)
        self.entries.append(entry)

    def _next_id(self):
        return max((e["id"] for e in self.entries), default=0) + 1

    def add(self, action, index):
        """Record an edit: mark pixels (flat indices) as clear or cloud, or reset them."""
        if action not in ACTIONS:
            raise JournalError(f"unknown QA action {action!r}; use one of {', '.join(ACTIONS)}")
        idx = sorted({int(i) for i in index})
        if not idx:
            raise JournalError("no pixels selected; draw a box or lasso on a map first")
        if idx[0] < 0 or idx[-1] >= self.n_pixels:
            raise JournalError(f"pixel index out of the scene (0–{self.n_pixels - 1})")
        with self._lock:
            self._refresh()
            entry = {"id": self._next_id(), "time": _now(), "action": action, "count": len(idx), "index": idx}
            self._append(entry)
        return entry

    def undo(self, check_latest=False, latest=None):
        """Cancel the latest edit that is still active; returns it (or None).

        With ``check_latest``, ``latest`` is the id of the latest active edit as the caller
        last showed it (None: no edits). When another writer (a second dashboard session on the
        same scene) has changed the edits since, nothing is undone and :class:`StaleEditsError`
        says so — an undo never cancels an edit its user has not seen.
        """
        with self._lock:
            self._refresh()
            active = self.active()
            if check_latest:
                if latest != (active[-1]["id"] if active else None):
                    raise StaleEditsError(
                        "the edits of this scene were changed in another session (or by the command line) "
                        "since this page showed them; the page now shows them — press Undo again to undo "
                        "the latest one")
            if not active:
                return None
            target = active[-1]
            self._append({"id": self._next_id(), "time": _now(), "action": "undo", "target": target["id"]})
            return target

    def active(self):
        """Edits in force, in order (those not undone)."""
        with self._lock:
            self._refresh()
            entries = list(self.entries)  # a snapshot: another thread's refresh may rebuild the list
        undone = {e["target"] for e in entries if e["action"] == "undo"}
        return [e for e in entries if e["action"] in ACTIONS and e["id"] not in undone]

    def listing(self):
        """(time, count, action) of the active edits, newest first."""
        return [(e["time"], e["count"], e["action"]) for e in reversed(self.active())]


def _now():
    return _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")

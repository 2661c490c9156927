"""Sessions in the window: save, save as, open, autosave and crash recovery.

A session (``.ballast`` file, versioned JSON written by :mod:`fitcore.session`) keeps
the measurements with the source file's name and SHA-256, the column choice, the
method, the exclusion record (reason and time per point) and the last result.

:class:`SessionManager` belongs to one main window. It

* turns the window's document into a :class:`fitcore.session.Session` and back
  (:func:`document_to_session`, :func:`apply_session`);
* saves atomically (fitcore writes a temporary file, fsyncs and renames);
* after every change to the work, waits until the changes pause
  (``autosave_ms``) and writes a recovery file into the recovery folder;
* at start (:meth:`SessionManager.offer_recovery`, called by the entry point) offers
  to restore work that a crash left behind;
* after opening a session, refits and checks that the estimates equal the stored
  ones bit for bit, and says so if they do not (e.g. a session from another version);
* before the work on screen is replaced (another file, a pasted table, a session),
  asks whether to save it when it holds unsaved changes (:meth:`confirm_replace`,
  the same question as at close).

The window adds one optional top-level object to the session JSON, ``"view"``: how
the work was looked at (``{"log_x": false, "log_y": true, "colour_by": "leverage",
"diagnostics": true}``). :mod:`fitcore.session` ignores fields it does not know, so
the format version stays 1: older Ballast versions read such a file (without the
view) and a file without ``"view"`` opens here with the sample set's own view, or the
axes as they are. ``"saved_as"`` holds the absolute path the session was saved to
(for a recovery file: the session the work belongs to; "" for work never saved).

Questions to the user go through module functions (:func:`ask_restore`,
:func:`ask_unsaved`) so tests can replace them and no modal dialog blocks a test.
A session that cannot be read leaves the current work exactly as it was.
"""
from __future__ import annotations

import json
import os
from pathlib import Path

import numpy as np
from fitcore import __version__
from fitcore.session import (
    WRITTEN_FOLDERS_NAME,
    Session,
    SessionError,
    claim_recovery,
    clean_debris,
    clean_written_folders,
    file_sha256,
    give_back_orphan,
    load_json_bounded,
    load_session,
    new_recovery_owner,
    note_written_folders_in,
    orphaned_recovery,
    read_bounded_file,
    release_recovery,
    save_session_text,
    session_to_json,
    set_aside_damaged,
    take_orphan,
    window_recovery_path,
    write_recovery,
)
from PySide6.QtCore import QObject, QStandardPaths, QTimer
from PySide6.QtWidgets import QFileDialog, QMessageBox

from . import dialogs
from .document import MaskChange
from .unknowns_view import clean_samples

SESSION_FILTER = "Ballast sessions (*.ballast);;All files (*)"
#: quiet time after the last change before the recovery file is written
AUTOSAVE_MS = 2000
#: environment variable that overrides the recovery folder
RECOVERY_ENV = "BALLAST_RECOVERY_DIR"


# ============================================================================ hooks
def ask_restore(parent, text: str) -> bool:
    """Ask whether to restore autosaved work (tests replace this function)."""
    box = QMessageBox(QMessageBox.Question, "Recover unsaved work", text,
                      QMessageBox.Yes | QMessageBox.No, parent)
    box.button(QMessageBox.Yes).setText("Restore")
    box.button(QMessageBox.No).setText("Discard")
    box.setDefaultButton(QMessageBox.Yes)
    return box.exec() == QMessageBox.Yes  # safe: Qt dialog event loop


def ask_unsaved(parent, text: str) -> str:
    """``"save"``, ``"discard"`` or ``"cancel"`` for unsaved work at close (replaceable)."""
    r = QMessageBox.question(parent, "Unsaved work", text,
                             QMessageBox.Save | QMessageBox.Discard | QMessageBox.Cancel,
                             QMessageBox.Save)
    return {QMessageBox.Save: "save", QMessageBox.Discard: "discard"}.get(r, "cancel")


#: the view fields a session keeps, with their types
VIEW_FIELDS = {"log_x": bool, "log_y": bool, "colour_by": str, "diagnostics": bool,
               "unknowns": list}  # unknowns: [[name, [readings...]], ...] (issue 14)
COLOUR_MODES = ("none", "leverage", "influence")


def ask_save_path(parent, start: str) -> str:
    """A path to save a session to, or "" when cancelled (replaceable)."""
    path, _ = QFileDialog.getSaveFileName(parent, "Save session", start, SESSION_FILTER)
    return path


def ask_open_path(parent, start: str) -> str:
    """A session file to open, or "" when cancelled (replaceable)."""
    path, _ = QFileDialog.getOpenFileName(parent, "Open session", start, SESSION_FILTER)
    return path


def default_recovery_dir(qsettings=None) -> Path:
    """Where recovery files go.

    ``$BALLAST_RECOVERY_DIR`` if set; else, for a window given its own settings file
    (tests, portable use), a ``recovery`` folder beside that file; else the
    application's local data folder (``QStandardPaths.AppLocalDataLocation``).
    """
    env = os.environ.get(RECOVERY_ENV, "").strip()
    if env:
        return Path(env)
    if qsettings is not None and qsettings.fileName():
        return Path(qsettings.fileName()).resolve().parent / "recovery"
    base = QStandardPaths.writableLocation(QStandardPaths.AppLocalDataLocation)
    return Path(base or Path.home() / ".ballast") / "recovery"


# ============================================================================ conversion
def document_to_session(doc, *, source_sha256: str = "", include_result: bool = True):
    """A :class:`fitcore.session.Session` holding what the document holds: its data set,
    its method and its exclusion record (the same :mod:`fitcore.work` types).

    The last result is stored only when it belongs to the current inputs (not stale),
    so a reopened session never shows estimates from other inputs.
    """
    m = doc.measurements
    data = m.with_(source_sha256=source_sha256) if source_sha256 != m.source_sha256 else m
    session = Session(data=data, method=doc.settings, exclusions=doc.exclusions())
    res = doc.result
    if (include_result and res is not None and not doc.stale
            and doc.result_generation == doc.generation and len(res.weights) == m.n):
        session.store_result(res)
    return session


def apply_session(doc, session) -> None:
    """Put a session's data set, method and exclusion record into the document."""
    doc.apply_measurements(session.data, settings=session.method)
    if session.exclusions:
        ex = sorted(session.exclusions, key=lambda e: e.index)
        idx = np.array([e.index for e in ex], np.intp)
        k = idx.size
        change = MaskChange(idx, np.zeros(k, bool), np.ones(k, bool),
                            [""] * k, [e.reason for e in ex], [""] * k, [e.time for e in ex])
        doc.apply_mask_change(change)


# ============================================================================ view
def window_view(window) -> dict:
    """The window's view of the work (what a reopened session shows again)."""
    view = {}
    plot = getattr(window, "plot", None)
    if plot is not None:
        view["log_x"] = bool(plot.log_x)
        view["log_y"] = bool(plot.log_y)
    diag = getattr(window, "diagnostics", None)
    if diag is not None:
        view["colour_by"] = str(diag.colour_mode)
        view["diagnostics"] = bool(diag.enabled)
    unknowns = getattr(window, "unknowns", None)
    if unknowns is not None and unknowns.samples:
        view["unknowns"] = [[n, list(r)] for n, r in unknowns.samples]
    return view


def clean_view(raw) -> dict:
    """The known, well-typed fields of a stored view (anything else is ignored)."""
    if not isinstance(raw, dict):
        return {}
    out = {k: v for k, v in raw.items() if k in VIEW_FIELDS and isinstance(v, VIEW_FIELDS[k])}
    if out.get("colour_by") not in (None, *COLOUR_MODES):
        out.pop("colour_by")
    if "unknowns" in out:
        out["unknowns"] = clean_samples(out["unknowns"])
    return out


def apply_view(window, view: dict) -> None:
    """Show the work as ``view`` says (missing fields leave that part as it is)."""
    for key, name in (("log_x", "logx_action"), ("log_y", "logy_action")):
        act = getattr(window, name, None)
        if key in view and act is not None:
            act.setChecked(bool(view[key]))
    if "diagnostics" in view and getattr(window, "diag_action", None) is not None:
        window.diag_action.setChecked(bool(view["diagnostics"]))
    if "colour_by" in view and hasattr(window, "set_colour_mode"):
        window.set_colour_mode(view["colour_by"])
    if "unknowns" in view and getattr(window, "unknowns", None) is not None:
        window.unknowns.set_samples(view["unknowns"])


def session_json(session, view: dict | None = None) -> str:
    """The session's JSON text (:func:`fitcore.session.session_to_json`) with the
    window's ``"view"`` object added at the top level."""
    text = session_to_json(session)
    if not view:
        return text
    text = text.rstrip()
    return text[:-1] + ',"view":' + json.dumps(view, separators=(",", ":")) + "}"


def write_session(path, session, view: dict | None = None) -> Path:
    """Write a session with its view atomically (temporary file, fsync, rename)."""
    return save_session_text(path, session_json(session, view))


def write_recovery_with_view(session, folder, for_path=None, view: dict | None = None, target=None) -> Path:
    """:func:`fitcore.session.write_recovery`, keeping the view too (into ``target``
    when given: a window's own recovery file)."""
    return write_recovery(session, folder, for_path, target=target,
                          write=lambda path, s: write_session(path, s, view))


def read_view(path) -> dict | None:
    """The ``"view"`` stored in a session file, or None when it has none (older files)."""
    try:
        doc = load_json_bounded(read_bounded_file(path).decode("utf-8-sig"))
    except (SessionError, UnicodeDecodeError):
        return None
    if not isinstance(doc, dict) or "view" not in doc:
        return None
    return clean_view(doc["view"])


# ============================================================================ manager
class SessionManager(QObject):
    """Session files and autosave for one main window.

    Parameters
    ----------
    window
        The main window (its ``document``, ``runner``, ``undo_stack``, status bar).
    recovery_dir
        Folder for recovery files; default :func:`default_recovery_dir`.
    autosave_ms
        Quiet time after the last change before the recovery file is written.
    """

    def __init__(self, window, recovery_dir=None, autosave_ms: int = AUTOSAVE_MS, qsettings=None):
        super().__init__(window)
        self.window = window
        self.document = window.document
        self.recovery_dir = Path(recovery_dir) if recovery_dir else default_recovery_dir(qsettings)
        self.path: str | None = None  # the session file the work belongs to
        self.dirty = False  # not saved as a session (autosave writes a recovery file)
        #: changes made since the data were loaded, opened or saved (what a replace or a
        #: close would lose); a freshly opened file holds none
        self.modified = False
        #: True in the program (entry point): ask before closing with unsaved work or
        #: replacing it with other data
        self.interactive = False
        self._forget_recovery = False  # the user chose to discard the work on screen
        self.source_sha256 = ""
        self.last_recovery: Path | None = None
        # every folder written to is noted, so the next start removes crashed writers' debris
        note_written_folders_in(self.recovery_dir / WRITTEN_FOLDERS_NAME)
        #: this window's own recovery file (with a lock naming this process); a window
        #: never deletes another running window's file
        self.owner = new_recovery_owner()
        self.own_recovery = window_recovery_path(self.recovery_dir, self.owner)
        self._claimed = False
        #: after a restore: the path the crashed work was saved to, offered (not used) at
        #: the next save; a recovery file is not trusted to name where to write
        self.suggested_path: str | None = None
        self.last_check: bool | None = None  # did the reopened session reproduce?
        self._applying = False
        self._verify = None  # (stored session, generation) awaiting the refit
        self._timer = QTimer(self)
        self._timer.setSingleShot(True)
        self._timer.setInterval(int(autosave_ms))
        self._timer.timeout.connect(self.autosave)
        self.document.subscribe(self._on_document)

    # ------------------------------------------------------------------ state
    def _status(self, text: str, ms: int = 8000):
        self.window.statusBar().showMessage(text, ms)

    def _on_document(self, event, **info):
        if event == "selection":
            return
        if event == "data" and not self._applying:
            if self._forget_recovery:  # the replaced work was discarded on purpose
                self.discard_recovery()
                self._forget_recovery = False
            self.path = None  # new data: new, unsaved work
            self.modified = False
            self.source_sha256 = self._hash_source(self.document.measurements.source)
        elif event in ("mask", "reasons", "settings") and not self._applying:
            self.modified = True
        if event == "result":
            self._check_reproduced()
        elif not self._applying:
            self.dirty = True
        # autosave at most autosave_ms after the first unsaved change: the timer is not
        # restarted by later changes (a steady stream of edits would postpone it forever)
        if self.has_unsaved_work() and not self._applying and not self._timer.isActive():
            self._timer.start()

    @staticmethod
    def _hash_source(source: str) -> str:
        if source and os.path.isfile(source):
            try:
                return file_sha256(source)
            except OSError:
                return ""
        return ""

    def _title(self):
        if self.path:
            self.window.setWindowTitle(f"Ballast - {os.path.basename(self.path)}")

    def has_unsaved_work(self) -> bool:
        """True when replacing or closing would lose changes (exclusions, reasons,
        method) that are not saved in a session; a reason still being typed counts."""
        self.document.flush_pending_edits()
        return bool(self.modified and self.dirty and self.document.has_data)

    def _ask_save(self, question: str) -> bool:
        """Save / Discard / Cancel for unsaved work; True when it is safe to go on."""
        if not (self.interactive and self.has_unsaved_work()):
            return True
        answer = ask_unsaved(self.window, question)
        if answer == "cancel":
            return False
        if answer == "save":
            return self.save()
        return True

    def confirm_replace(self, new: str = "") -> bool:
        """Before other data replace the work: ask to save unsaved changes.

        True when the caller may go on (saved, discarded, or nothing to lose); False
        when the user cancelled (or the save did not happen): nothing is changed.
        """
        name = os.path.basename(self.path) if self.path else "this work"
        what = f"opening {new}" if new else "replacing the data"
        n_ex = int(self.document.excluded.sum()) if self.document.has_data else 0
        lost = (f" (the exclusion record holds {dialogs.counted(n_ex, 'point')})" if n_ex else "")
        ok = self._ask_save(f"Save the changes to {name} as a session before {what}? "
                            f"Otherwise the changes{lost} are lost.")
        self._forget_recovery = ok and self.interactive and self.has_unsaved_work()
        return ok

    def current_session(self):
        """The work as a :class:`fitcore.session.Session` (waits for a pending fit)."""
        runner = getattr(self.window, "runner", None)
        if runner is not None:
            runner.wait(30000)
        return document_to_session(self.document, source_sha256=self.source_sha256)

    # ------------------------------------------------------------------ save
    def save(self) -> bool:
        """Save to the current session file (asks for one the first time)."""
        if not self.path:
            return self.save_as()
        return self.save_to(self.path)

    def save_as(self) -> bool:
        start = self.path or self.suggested_path or self._suggest_name()
        path = ask_save_path(self.window, start)
        if not path:
            return False
        if not path.endswith(".ballast"):
            path += ".ballast"
        return self.save_to(path)

    def _suggest_name(self) -> str:
        src = self.document.measurements.source
        if src and os.path.isfile(src):
            return str(Path(src).with_suffix(".ballast"))
        return str(Path.home() / "untitled.ballast")

    def save_to(self, path) -> bool:
        """Write the session to ``path`` atomically; a failure says why, loses nothing."""
        if not self.document.has_data:
            dialogs.error_box(self.window, "Nothing to save", "Open measurements first.")
            return False
        path = str(Path(path).expanduser().absolute())
        src = self.document.measurements.source
        if src and os.path.isfile(src) and os.path.exists(path) and os.path.samefile(src, path):
            dialogs.error_box(self.window, "Cannot save the session",
                              "That is the measurement file itself; a session never overwrites "
                              "the data it was made from. Choose another name.")
            return False
        try:
            session = self.current_session()
            session.saved_as = path
            write_session(path, session, window_view(self.window))
        except (SessionError, OSError) as err:
            dialogs.error_box(self.window, "Cannot save the session", str(err))
            return False
        self.path = path
        self.dirty = False
        self.modified = False
        self._timer.stop()
        self.suggested_path = None
        self.discard_recovery()  # this window's own file only; other windows' files stay
        self._title()
        self.window.add_recent(path)
        self._status(f"Session saved to {path}.")
        return True

    # ------------------------------------------------------------------ open
    def open_dialog(self) -> bool:
        start = os.path.dirname(self.path) if self.path else str(Path.home())
        path = ask_open_path(self.window, start)
        if not path or not self.confirm_replace(os.path.basename(path)):
            return False
        return self.open_session(path)

    def open_session(self, path) -> bool:
        """Open a session file. A bad file: a clear message, the current work stays."""
        run_job = getattr(self.window, "run_job", None)
        if run_job is not None:  # read and check it in a child process first (desktop.jobs)
            job = run_job("session", {"path": str(path)}, f"Opening {os.path.basename(str(path))}...")
            if job.state == "cancelled":
                return False
            if job.state == "failed":
                dialogs.error_box(self.window, "Cannot open the session", job.message)
                return False
        try:
            session = load_session(path)
        except SessionError as err:
            dialogs.error_box(self.window, "Cannot open the session", str(err))
            return False
        if not self._show(session, f"{os.path.basename(str(path))}", read_view(path)):
            return False
        self.path = str(Path(path).expanduser().absolute())
        self.dirty = False
        self.modified = False
        self._timer.stop()
        self._title()
        self.window.add_recent(self.path)
        return True

    def _show(self, session, name: str, view: dict | None = None) -> bool:
        win = self.window
        runner = getattr(win, "runner", None)
        was = runner.enabled if runner is not None else None
        self._applying = True
        try:
            if runner is not None:
                runner.enabled = False  # one fit after everything is in place
            win.undo_stack.clear()
            apply_session(self.document, session)
        finally:
            self._applying = False
            if runner is not None:
                runner.enabled = was
        self.source_sha256 = session.source_sha256
        if self._forget_recovery:  # the replaced work was discarded on purpose
            self.discard_recovery()
            self._forget_recovery = False
        panel = getattr(win, "method_panel", None)
        if panel is not None:
            panel.sync_from_document()
        if view is None:  # a session without a stored view: a sample set's own view
            view = dialogs.sample_view(session.source_file) if session.source_file else None
        if view:
            apply_view(win, view)
        self._verify = (session, self.document.generation) if session.result else None
        self.last_check = None
        msg = (f"Opened {name}: {dialogs.counted(session.n_points, 'point')}, "
               f"{len(session.exclusions)} excluded")
        if session.source_file:
            msg += f" (data from {os.path.basename(session.source_file)})"
        self._status(msg + ".")
        if runner is not None:
            runner.fit_now()
        return True

    def _check_reproduced(self):
        if self._verify is None:
            return
        session, gen = self._verify
        doc = self.document
        if doc.generation != gen:
            self._verify = None
            return
        if doc.result is None or doc.result_generation != gen:
            if doc.fit_failed:
                self._verify = None
                self.last_check = False
                dialogs.error_box(self.window, "Session refit failed",
                                  f"The stored method no longer fits these data: {doc.fit_message}")
            return
        self._verify = None
        self.last_check = session.reproduces(doc.result)
        if not self.last_check:
            made = session.ballast_version or "an unknown version"
            dialogs.error_box(
                self.window, "Estimates differ from the saved ones",
                f"Refitting the saved data and method gives estimates that differ from those "
                f"stored in the session (saved by Ballast {made}, this is Ballast {__version__}). "
                "The window shows the new fit; the session file is unchanged.")

    # ------------------------------------------------------------------ recovery
    def autosave(self):
        """Write the recovery file now (normally called by the debounce timer)."""
        if not self.has_unsaved_work():  # nothing a crash could lose: no recovery file
            return None
        try:
            session = document_to_session(self.document, source_sha256=self.source_sha256)
            if not self._claimed:
                claim_recovery(self.own_recovery)  # the lock first: never seen as orphaned
                self._claimed = True
            self.last_recovery = write_recovery_with_view(session, self.recovery_dir,
                                                          for_path=self.path or self.suggested_path,
                                                          view=window_view(self.window),
                                                          target=self.own_recovery)
        except (SessionError, OSError) as err:
            self._status(f"Autosave failed: {err}", 15000)
            return None
        return self.last_recovery

    def discard_recovery(self):
        """Delete this window's own recovery file and lock (never another window's)."""
        self._timer.stop()
        release_recovery(self.own_recovery)
        self._claimed = False

    def offer_recovery(self) -> bool:
        """Offer to restore work that crashed windows left behind; True if restored.

        Only orphaned recovery files are offered (their window no longer runs); the files
        of running windows are never read, offered or deleted. An orphan is taken
        atomically before it is read (:func:`fitcore.session.take_orphan`), so two windows
        starting at once never both offer it. Each orphan is offered in
        turn, newest first: Restore loads it into this window (it then lives on as this
        window's own recovery file), Discard deletes that one. An unreadable one is
        reported and set aside as ``<name>.damaged`` so it is not offered again.
        Leftover temporary files of dead writers are removed first (in the recovery
        folder and every folder Ballast wrote into, :func:`fitcore.session.clean_written_folders`).
        """
        clean_debris(self.recovery_dir)
        clean_written_folders(self.recovery_dir / WRITTEN_FOLDERS_NAME)
        for found in orphaned_recovery(self.recovery_dir):
            # taken atomically first: of two windows starting at once only one offers it,
            # the other skips it silently
            orphan = take_orphan(found, self.owner)
            if orphan is None:
                continue
            try:
                session = load_session(orphan)
            except SessionError as err:
                moved = set_aside_damaged(orphan)
                where = (f"It was renamed to {moved} and will not be offered again."
                         if moved else f"It is left at {orphan}.")
                dialogs.error_box(self.window, "Cannot read the recovery file", f"{err}\n{where}")
                continue
            what = (f"for {os.path.basename(session.saved_as)}" if session.saved_as
                    else "that was never saved")
            src = os.path.basename(session.source_file) if session.source_file else "pasted data"
            text = (f"Ballast found work {what}, autosaved at {session.created or 'an unknown time'} "
                    f"({dialogs.counted(session.n_points, 'point')} from {src}, "
                    f"{len(session.exclusions)} excluded). "
                    "It was probably left by a crash. Restore it?")
            if not ask_restore(self.window, text):
                release_recovery(orphan)
                continue
            if not self._show(session, "recovered work", read_view(orphan)):
                give_back_orphan(orphan)  # kept: offered again at a later start
                return False
            self.path = None  # the stored path is a suggestion: Save asks where to write
            self.suggested_path = session.saved_as or None
            self.dirty = True  # recovered work is not saved yet
            self.modified = True
            self.autosave()  # safe under this window's own name until saved
            if self.last_recovery is not None and self.last_recovery.exists():
                release_recovery(orphan)
            if self.suggested_path:
                self._status(f"Recovered work for {os.path.basename(self.suggested_path)}; Save asks where to "
                             "save it (the recovered file is not overwritten without asking).", 15000)
            return True
        return False

    # ------------------------------------------------------------------ closing
    def confirm_close(self) -> bool:
        """True when the window may close. Interactive: asks about unsaved work."""
        name = os.path.basename(self.path) if self.path else "this work"
        if not self._ask_save(f"Save the changes to {name} as a session before closing?"):
            return False
        self.discard_recovery()
        return True

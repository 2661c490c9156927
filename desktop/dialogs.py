"""Small dialogs: error messages, column choice, exclusion reason, sample-set picker.

Error and question boxes go through module functions (:func:`error_box`,
:func:`ask_text`) so tests can replace them and no modal dialog blocks a test run.
"""
from __future__ import annotations

import re
from pathlib import Path

from PySide6.QtWidgets import (
    QComboBox, QDialog, QDialogButtonBox, QFormLayout, QInputDialog, QLabel, QListWidget,
    QListWidgetItem, QMessageBox, QVBoxLayout,
)

#: the sample data: desktop/sample_sets in an installed copy (package data), the
#: top-level sample_sets/ in a checkout or an editable install
SAMPLE_DIR = next((d for d in (Path(__file__).resolve().parent / "sample_sets",
                               Path(__file__).resolve().parents[1] / "sample_sets") if d.is_dir()),
                  Path(__file__).resolve().parents[1] / "sample_sets")
DATA_SUFFIXES = (".csv", ".tsv", ".txt", ".xlsx", ".ods")


#: a suggested method per sample set (file-name prefix -> Settings fields)
SAMPLE_METHODS = {
    "01": dict(model="line", loss="huber"),
    "02": dict(model="exp_decay", loss="huber"),
    "03": dict(model="michaelis_menten", loss="huber"),
    "04": dict(model="R25*exp(B*(1/x - 1/298.15))", model_kind="formula", loss="huber",
               p0=(("B", 3500.0), ("R25", 10.0))),
    "05": dict(model="logistic4", loss="huber"),
    "06": dict(model="gauss_peak", loss="huber"),
    "07": dict(model="line", loss="tukey"),
}


#: suggested view per sample set: doses spaced by factors of about 3 read best on a log x axis
SAMPLE_VIEWS = {
    "05": dict(log_x=True),
}


def sample_view(path):
    """Suggested view (``log_x``, ``log_y``) for a sample-set file, or None for other files.

    Every sample set gets a full answer (linear axes unless listed in :data:`SAMPLE_VIEWS`),
    so one sample's log axis does not carry over to the next sample opened.
    """
    p = Path(path).resolve()
    if p.parent != SAMPLE_DIR:
        return None
    return dict(dict(log_x=False, log_y=False), **SAMPLE_VIEWS.get(p.name[:2], {}))


def sample_method(path):
    """Suggested settings fields for a sample-set file, or None for other files."""
    p = Path(path).resolve()
    if p.parent != SAMPLE_DIR:
        return None
    return SAMPLE_METHODS.get(p.name[:2])


def error_box(parent, title: str, text: str) -> None:
    """Show an error message (tests replace this function)."""
    QMessageBox.warning(parent, title, text)


def ask_text(parent, title: str, label: str) -> str | None:
    """Ask for one line of text; None when cancelled (tests replace this function)."""
    text, ok = QInputDialog.getText(parent, title, label)
    return text.strip() if ok else None


class ColumnDialog(QDialog):
    """Choose the x, y and (optional) sigma_y columns of a table."""

    def __init__(self, table, parent=None):
        super().__init__(parent)
        self.setWindowTitle("Choose columns")
        numeric = table.numeric_columns()
        lay = QVBoxLayout(self)
        lay.addWidget(QLabel(f"{len(numeric)} columns hold numbers. Which are x, y and the "
                             "standard uncertainty of y?"))
        form = QFormLayout()

        def label(c):
            u = table.units.get(c, "")
            return f"{c} ({u})" if u else c

        self.x = QComboBox()
        self.y = QComboBox()
        self.s = QComboBox()
        self.s.addItem("(none)", None)
        for c in numeric:
            self.x.addItem(label(c), c)
            self.y.addItem(label(c), c)
            self.s.addItem(label(c), c)
        if len(numeric) > 1:
            self.y.setCurrentIndex(1)
        # a third column whose name suggests an uncertainty is offered as sigma
        for i, c in enumerate(numeric[2:], start=2):
            low = c.lower()
            if low.startswith(("u", "s", "err", "unc", "sd")) or "sigma" in low or "unc" in low:
                self.s.setCurrentIndex(i + 1)
                break
        form.addRow("x", self.x)
        form.addRow("y", self.y)
        form.addRow("sigma_y", self.s)
        lay.addLayout(form)
        buttons = QDialogButtonBox(QDialogButtonBox.Ok | QDialogButtonBox.Cancel)
        buttons.accepted.connect(self.accept)
        buttons.rejected.connect(self.reject)
        lay.addWidget(buttons)

    def choice(self):
        """``(x, y, sigma)`` column names (sigma may be None)."""
        return self.x.currentData(), self.y.currentData(), self.s.currentData()


def sample_sets() -> list[Path]:
    """The sample data files shipped beside the program, sorted by name."""
    if not SAMPLE_DIR.is_dir():
        return []
    return sorted(p for p in SAMPLE_DIR.iterdir() if p.suffix.lower() in DATA_SUFFIXES)


def counted(n: int, word: str, plural: str | None = None) -> str:
    """``"1 point"``, ``"2 points"``: a count with its noun in the right number."""
    n = int(n)
    return f"{n} {word if n == 1 else (plural or word + 's')}"


def _first_sentence(text: str, wide: int = 90) -> str:
    """The first sentence of a README cell; a long one up to its colon (one list line)."""
    text = re.sub(r"\*\*|`", "", text).strip()
    m = re.match(r"(.+?[.!?])(\s|$)", text)
    s = (m.group(1) if m else text).strip()
    if len(s) > wide and ": " in s:
        s = s.split(": ", 1)[0] + "."
    return s


def readme_descriptions(readme: Path | None = None) -> dict[str, str]:
    """File name -> one-line story, from the table in ``sample_sets/README.md``.

    The README describes every set whatever its format (a spreadsheet or a UTF-16 text
    file has no first line that could be read as text); the first sentence of the
    "story" column is the description.
    """
    readme = readme or SAMPLE_DIR / "README.md"
    try:
        text = readme.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError):
        return {}
    out = {}
    for line in text.splitlines():
        cells = [c.strip() for c in line.strip().strip("|").split("|")]
        if len(cells) < 3:
            continue
        name = cells[0].strip("`").strip()
        if Path(name).suffix.lower() in DATA_SUFFIXES and cells[2]:
            out[name] = _first_sentence(cells[2])
    return out


def _text_title(path: Path) -> str:
    """First title or comment line of a UTF-8 text file ("" for anything else)."""
    if path.suffix.lower() not in (".csv", ".tsv", ".txt"):
        return ""
    try:
        with open(path, "rb") as fh:
            raw = fh.read(4096)
    except OSError:
        return ""
    if b"\x00" in raw:  # UTF-16 or binary: not plain UTF-8 text
        return ""
    text = raw.decode("utf-8-sig", errors="replace")
    for line in text.splitlines()[:5]:
        s = line.strip().lstrip("#").strip()
        if "\ufffd" in s:
            return ""
        if s and not s[:1].isdigit() and ("," not in s or line.lstrip().startswith("#")):
            return s
    return ""


def sample_description(path: Path) -> str:
    """The one-line story of a sample set: from the sets' README, else the file's own
    title line (plain UTF-8 text files only), else ""."""
    path = Path(path)
    return readme_descriptions(path.parent / "README.md").get(path.name) or _text_title(path)


class SamplePicker(QDialog):
    """List of the sample sets; returns the chosen path."""

    def __init__(self, parent=None):
        super().__init__(parent)
        self.setWindowTitle("Open a sample set")
        self.resize(560, 360)
        lay = QVBoxLayout(self)
        lay.addWidget(QLabel("Invented demo data sets, each showing one situation:"))
        self.list = QListWidget()
        for p in sample_sets():
            d = sample_description(p)
            it = QListWidgetItem(p.stem.replace("_", " ") + (f"\n    {d}" if d else ""))
            it.setData(256, str(p))
            self.list.addItem(it)
        if self.list.count():
            self.list.setCurrentRow(0)
        self.list.itemDoubleClicked.connect(lambda _it: self.accept())
        lay.addWidget(self.list)
        buttons = QDialogButtonBox(QDialogButtonBox.Open | QDialogButtonBox.Cancel)
        buttons.accepted.connect(self.accept)
        buttons.rejected.connect(self.reject)
        lay.addWidget(buttons)

    def path(self) -> str | None:
        it = self.list.currentItem()
        return it.data(256) if it is not None else None

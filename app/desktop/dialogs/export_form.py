"""The controls of the export dialog, built group by group, and the one place they are wired.

:class:`ExportFormMixin` is one part of :class:`~modescope.app.desktop.dialogs.export.ExportDialog`:
``_build`` lays out the groups ("What to write", "Options", "Destination folder"), the two live
lines, the message, progress and report area and the buttons; ``_wire`` connects every control
and the state to the dialog's slots.
"""

from __future__ import annotations

from PySide6.QtCore import Qt
from PySide6.QtWidgets import (
    QButtonGroup,
    QCheckBox,
    QComboBox,
    QFormLayout,
    QGridLayout,
    QGroupBox,
    QHBoxLayout,
    QLabel,
    QLineEdit,
    QPlainTextEdit,
    QProgressBar,
    QPushButton,
    QRadioButton,
    QSpinBox,
    QVBoxLayout,
    QWidget,
)

__all__ = ["ExportFormMixin", "PARTS", "DEFAULT_PARTS", "PER_IMAGE_PARTS", "FORMAT_LABELS",
           "MESSAGE_STYLE"]

#: The parts of an export as shown in the dialog: (core name, label, file names for rank k).
PARTS = (
    ("previews", "Previews (rank-k reconstructions)", lambda k, ext: f"<name>_r{k}{ext}"),
    ("basis", "Basis images and the mean image", lambda k, ext: "mean.png, basis_001.png …"),
    ("sheet", "Contact sheet of basis images", lambda k, ext: "basis_sheet.png"),
    ("weights", "Weights table", lambda k, ext: f"weights_r{k}.csv"),
    ("spectrum", "Singular values table", lambda k, ext: "spectrum.csv"),
    ("quality", "Reconstruction quality table", lambda k, ext: f"quality_r{k}.csv"),
    ("model", "Compact model", lambda k, ext: f"model_r{k}.npz"),
)
#: The parts ticked when the dialog opens.
DEFAULT_PARTS = ("previews", "basis", "weights", "spectrum")
#: The parts written per image (the "Images" choice applies to them).
PER_IMAGE_PARTS = ("previews", "weights", "quality")
#: (format key, label) of the preview formats.
FORMAT_LABELS = (("png", "PNG (8-bit)"), ("jpg", "JPEG (8-bit)"),
                 ("webp", "WebP (8-bit)"), ("tiff", "TIFF (16-bit)"))

#: Style of the message line by kind of message.
MESSAGE_STYLE = {
    "error": "QLabel { background: #fbeae7; color: #6b1a10; border: 1px solid #e2b4ac;"
             " border-radius: 3px; padding: 6px; }",
    "done": "QLabel { background: #e8f2e6; color: #1f4a1a; border: 1px solid #b7d3b0;"
            " border-radius: 3px; padding: 6px; }",
    "info": "QLabel { background: #eef1f5; color: #22303f; border: 1px solid #c5cfdb;"
            " border-radius: 3px; padding: 6px; }",
}
_WARNING_STYLE = "QLabel { color: #8a4b00; }"


class ExportFormMixin:
    """Build and wire the export dialog's controls (a part of ``ExportDialog``).

    The slots wired here (``_on_option_changed``, ``_on_folder_edited``, ``choose_folder``,
    ``start_export``, ``cancel_export``, ``_show_folder``, ``_on_state_changed``) belong to the
    other parts of the dialog.
    """

    def _build(self) -> None:
        outer = QVBoxLayout(self)
        self.analysis_label = QLabel("", self)
        self.analysis_label.setWordWrap(True)
        outer.addWidget(self.analysis_label)
        columns = QHBoxLayout()
        left, right = QVBoxLayout(), QVBoxLayout()
        columns.addLayout(left, 1)
        columns.addLayout(right, 1)
        outer.addLayout(columns)
        left.addWidget(self._build_what_group())
        left.addWidget(self._build_destination_group())
        left.addStretch(1)
        right.addWidget(self._build_options_group())
        right.addStretch(1)
        self._build_live_lines(outer)
        self._build_feedback(outer)
        outer.addLayout(self._build_buttons())
        self.setMinimumWidth(760)

    def _build_what_group(self) -> QGroupBox:
        what_box = QGroupBox("What to write", self)
        grid = QGridLayout(what_box)
        self.what_boxes: dict[str, QCheckBox] = {}
        self._file_labels: dict[str, QLabel] = {}
        for row, (name, text, _files) in enumerate(PARTS):
            box = QCheckBox(text, what_box)
            box.setChecked(name in DEFAULT_PARTS)
            files = QLabel("", what_box)
            files.setEnabled(False)      # drawn dimmer: a hint, not a control
            grid.addWidget(box, row, 0)
            grid.addWidget(files, row, 1)
            self.what_boxes[name] = box
            self._file_labels[name] = files
        grid.setColumnStretch(1, 1)
        return what_box

    def _build_options_group(self) -> QGroupBox:
        opt_box = QGroupBox("Options", self)
        form = QFormLayout(opt_box)
        form.addRow("Rank (basis images used):", self._build_rank_row(opt_box))
        form.addRow("Preview format:", self._build_format_row(opt_box))
        form.addRow("Images:", self._build_images_column(opt_box))
        self.upsample_check = QCheckBox("Previews at the source size", opt_box)
        self.sheet_spin = QSpinBox(opt_box)
        self.sheet_spin.setRange(1, 1)
        self.sheet_spin.setValue(16)
        self.float16_check = QCheckBox("Compact model in float16 (half the size)", opt_box)
        sheet_row = QHBoxLayout()
        sheet_row.addWidget(self.sheet_spin)
        sheet_row.addStretch(1)
        form.addRow("", self.upsample_check)
        form.addRow("Contact sheet tiles:", sheet_row)
        form.addRow("", self.float16_check)
        return opt_box

    def _build_rank_row(self, parent: QWidget) -> QHBoxLayout:
        rank_row = QHBoxLayout()
        self.rank_spin = QSpinBox(parent)
        self.rank_spin.setRange(1, 1)
        self.rank_of_label = QLabel("", parent)
        rank_row.addWidget(self.rank_spin)
        rank_row.addWidget(self.rank_of_label)
        rank_row.addStretch(1)
        return rank_row

    def _build_format_row(self, parent: QWidget) -> QHBoxLayout:
        fmt_row = QHBoxLayout()
        self.format_combo = QComboBox(parent)
        for key, label in FORMAT_LABELS:
            self.format_combo.addItem(label, key)
        self.quality_label = QLabel("Quality:", parent)
        self.quality_spin = QSpinBox(parent)
        self.quality_spin.setRange(1, 100)
        self.quality_spin.setValue(90)
        self.quality_spin.setToolTip("JPEG and WebP quality, 1 (smallest files) to 100 (best)")
        fmt_row.addWidget(self.format_combo)
        fmt_row.addSpacing(12)
        fmt_row.addWidget(self.quality_label)
        fmt_row.addWidget(self.quality_spin)
        fmt_row.addStretch(1)
        return fmt_row

    def _build_images_column(self, parent: QWidget) -> QVBoxLayout:
        img_column = QVBoxLayout()
        img_column.setSpacing(2)
        self.images_all = QRadioButton("All images", parent)
        self.images_selected = QRadioButton("Selected images", parent)
        self.images_flagged = QRadioButton("Flagged as outliers", parent)
        self.images_group = QButtonGroup(self)
        for b in (self.images_all, self.images_selected, self.images_flagged):
            self.images_group.addButton(b)
            img_column.addWidget(b)
        self.images_all.setChecked(True)
        return img_column

    def _build_destination_group(self) -> QGroupBox:
        dest_box = QGroupBox("Destination folder", self)
        dest = QVBoxLayout(dest_box)
        folder_row = QHBoxLayout()
        self.folder_edit = QLineEdit(dest_box)
        self.folder_edit.setPlaceholderText("Choose a folder (created if missing)")
        self.browse_button = QPushButton("Browse…", dest_box)
        folder_row.addWidget(self.folder_edit, 1)
        folder_row.addWidget(self.browse_button)
        dest.addLayout(folder_row)
        self.overwrite_check = QCheckBox("Replace files that already exist", dest_box)
        self.source_folder_check = QCheckBox(
            "Allow writing into a folder that holds source images", dest_box)
        self.source_folder_warning = QLabel(
            "The exported files will sit next to the source images. Make sure you can tell "
            "them apart; with replacing allowed too, a source file with the same name as an "
            "exported file would be replaced.", dest_box)
        self.source_folder_warning.setWordWrap(True)
        self.source_folder_warning.setStyleSheet(_WARNING_STYLE)
        self.source_folder_warning.setVisible(False)
        dest.addWidget(self.overwrite_check)
        dest.addWidget(self.source_folder_check)
        dest.addWidget(self.source_folder_warning)
        return dest_box

    def _build_live_lines(self, outer: QVBoxLayout) -> None:
        """The two lines that say what the export will be (resolution, numbers stored)."""
        self.resolution_label = QLabel("", self)
        self.resolution_label.setWordWrap(True)
        self.compression_label = QLabel("", self)
        self.compression_label.setWordWrap(True)
        self.compression_label.setTextInteractionFlags(
            Qt.TextInteractionFlag.TextSelectableByMouse)
        outer.addWidget(self.resolution_label)
        outer.addWidget(self.compression_label)

    def _build_feedback(self, outer: QVBoxLayout) -> None:
        """The message line, the progress bar and the report of the last export."""
        self.message_label = QLabel("", self)
        self.message_label.setWordWrap(True)
        self.message_label.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        self.message_label.setVisible(False)
        outer.addWidget(self.message_label)
        self.progress_bar = QProgressBar(self)
        self.progress_bar.setFormat("%v of %m files")
        self.progress_bar.setVisible(False)
        outer.addWidget(self.progress_bar)
        self.report_view = QPlainTextEdit(self)
        self.report_view.setReadOnly(True)
        self.report_view.setLineWrapMode(QPlainTextEdit.LineWrapMode.WidgetWidth)
        self.report_view.setMaximumHeight(120)
        self.report_view.setVisible(False)
        outer.addWidget(self.report_view)

    def _build_buttons(self) -> QHBoxLayout:
        buttons = QHBoxLayout()
        self.open_folder_button = QPushButton("Show folder", self)
        self.open_folder_button.setVisible(False)
        self.export_button = QPushButton("Export", self)
        self.export_button.setDefault(True)
        self.cancel_button = QPushButton("Stop", self)
        self.cancel_button.setToolTip("Stop after the current file; completed files are kept")
        self.cancel_button.setEnabled(False)
        self.close_button = QPushButton("Close", self)
        self.close_button.setAutoDefault(False)
        buttons.addWidget(self.open_folder_button)
        buttons.addStretch(1)
        buttons.addWidget(self.export_button)
        buttons.addWidget(self.cancel_button)
        buttons.addWidget(self.close_button)
        return buttons

    def _wire(self) -> None:
        for box in self.what_boxes.values():
            box.toggled.connect(self._on_option_changed)
        for w in (self.upsample_check, self.float16_check, self.overwrite_check,
                  self.source_folder_check):
            w.toggled.connect(self._on_option_changed)
        self.rank_spin.valueChanged.connect(self._on_option_changed)
        self.format_combo.currentIndexChanged.connect(self._on_option_changed)
        self.images_group.buttonToggled.connect(self._on_option_changed)
        self.folder_edit.textChanged.connect(self._on_folder_edited)
        self.browse_button.clicked.connect(self.choose_folder)
        self.export_button.clicked.connect(self.start_export)
        self.cancel_button.clicked.connect(self.cancel_export)
        self.close_button.clicked.connect(self.close)
        self.open_folder_button.clicked.connect(self._show_folder)
        self.state.decompositionChanged.connect(self._on_state_changed)
        self.state.selectedChanged.connect(self._on_state_changed)
        self.state.selectionSetChanged.connect(self._on_state_changed)
        self.state.levelChanged.connect(self._on_state_changed)

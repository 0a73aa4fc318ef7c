"""One near-duplicate group as thumbnails side by side, each with its distance to the first.

The strip sits under the Near-duplicates tree. Each tile shows an image's thumbnail (made off
the GUI thread by :class:`~modescope.app.desktop.workers.thumbnails.ThumbnailMaker` from the
source file, or from the image as the analysis read it when the file cannot be previewed), its
number (from 1) and its distance to the group's first image as a percentage of the RMS image
norm. The distance is measured on the pixels, or an upper bound of it (see
:mod:`modescope.core.review.duplicates`): the true difference is at most the number shown.
"""

from __future__ import annotations

from typing import Any, Callable

import numpy as np
from PySide6.QtCore import Qt, Slot
from PySide6.QtGui import QPixmap
from PySide6.QtWidgets import QFrame, QHBoxLayout, QLabel, QScrollArea, QVBoxLayout, QWidget

from modescope.app.desktop.display import display_name
from modescope.app.desktop.workers.thumbnails import ThumbnailMaker

__all__ = ["GroupStrip", "GroupTile", "THUMB_SIZE"]

#: Longest side of a tile's picture, in pixels.
THUMB_SIZE = 96


class GroupTile(QFrame):
    """One image of the group: picture and caption.

    Attributes
    ----------
    index : int
        The image (0-based column).
    picture : QLabel
        The thumbnail once made (a blank box before).
    caption : QLabel
        ``"image N"`` and ``"first"`` or ``"Δ x.xx %"``.
    """

    def __init__(self, index: int, caption: str, tip: str, parent: QWidget | None = None):
        super().__init__(parent)
        self.index = int(index)
        self.setFrameShape(QFrame.Shape.StyledPanel)
        self.picture = QLabel(self)
        self.picture.setFixedSize(THUMB_SIZE, THUMB_SIZE)
        self.picture.setAlignment(Qt.AlignmentFlag.AlignCenter)
        self.caption = QLabel(caption, self)
        self.caption.setAlignment(Qt.AlignmentFlag.AlignCenter)
        self.setToolTip(tip)
        lay = QVBoxLayout(self)
        lay.setContentsMargins(3, 3, 3, 3)
        lay.setSpacing(2)
        lay.addWidget(self.picture, 0, Qt.AlignmentFlag.AlignHCenter)
        lay.addWidget(self.caption)


def _caption(position: int, index: int, distance: float, rms: float) -> str:
    if position == 0:
        return f"image {index + 1}\nfirst"
    share = 100.0 * distance / rms if rms > 0 else 0.0
    return f"image {index + 1}\nΔ {share:.2f} %"


class GroupStrip(QScrollArea):
    """Thumbnails of one group side by side, scrolling sideways when they do not fit.

    Parameters
    ----------
    load_image : callable(decomposition, index) -> ndarray
        The image as the analysis read it, (rows, cols, channels) in [0, 1]; used for the
        picture when the source file cannot be previewed.
    parent : QWidget, optional

    Attributes
    ----------
    tiles : list of GroupTile
        The tiles shown, the group's first image first.
    maker : ThumbnailMaker
    """

    def __init__(self, load_image: Callable[[Any, int], np.ndarray],
                 parent: QWidget | None = None):
        super().__init__(parent)
        self._load_image = load_image
        self.tiles: list[GroupTile] = []
        self._keys: dict = {}
        self.maker = ThumbnailMaker(size=THUMB_SIZE, cache_size=256, parent=self)
        self.maker.thumbnailReady.connect(self._on_thumbnail)
        self.setWidgetResizable(True)
        self.setFrameShape(QFrame.Shape.NoFrame)
        self.setVerticalScrollBarPolicy(Qt.ScrollBarPolicy.ScrollBarAlwaysOff)
        self.setMinimumHeight(THUMB_SIZE + 64)
        self.setToolTip("The selected group side by side: under each image its number and its "
                        "difference from the group's first image, as a percentage of the RMS "
                        "image norm (measured on the pixels, or an upper bound of it).")
        self._inner = QWidget(self)
        self._row = QHBoxLayout(self._inner)
        self._row.setContentsMargins(0, 0, 0, 0)
        self._row.addStretch(1)
        self.setWidget(self._inner)

    def clear(self) -> None:
        """Remove every tile."""
        for tile in self.tiles:
            self._row.removeWidget(tile)
            tile.deleteLater()
        self.tiles = []
        self._keys = {}

    def show_group(self, decomposition, group, rms: float) -> None:
        """Show the tiles of ``group`` (a DuplicateGroup of ``decomposition``)."""
        if self.tiles and decomposition is not None and group is not None and \
                [t.index for t in self.tiles] == list(group.indices) and \
                self._keys and next(iter(self._keys))[0] == id(decomposition.weights):
            return
        self.clear()
        if decomposition is None or group is None:
            return
        first = group.indices[0]
        for position, (i, path, page, dist) in enumerate(zip(group.indices, group.paths,
                                                             group.pages, group.distances)):
            name = display_name(path) if path else f"image {i + 1}"
            tip = f"image {i + 1}: {path or '(no file recorded)'}"
            if position:
                share = 100.0 * dist / rms if rms > 0 else 0.0
                tip += (f"\ndistance to image {first + 1}: at most {dist:.4g} ({share:.2f} % "
                        "of the RMS image norm)")
            tile = GroupTile(i, _caption(position, i, dist, rms), f"{name}\n{tip}", self._inner)
            self._row.insertWidget(self._row.count() - 1, tile)
            self.tiles.append(tile)
            key = (id(decomposition.weights), int(i))
            self._keys[key] = tile
            thumb = self.maker.request(key, path, int(page),
                                       fallback=self._fallback(decomposition, int(i)))
            if thumb is not None:
                self._set_picture(tile, thumb)

    def _fallback(self, decomposition, index: int) -> Callable[[], np.ndarray]:
        load = self._load_image
        return lambda: np.clip(np.asarray(load(decomposition, index), dtype=np.float32), 0, 1)

    @staticmethod
    def _set_picture(tile: GroupTile, thumb) -> None:
        if thumb.image.isNull():
            tile.picture.setText("no picture")
            tile.picture.setToolTip(thumb.note)
            return
        # small images are enlarged pixel for pixel so that tiles are comparable at a glance
        picture = QPixmap.fromImage(thumb.image).scaled(
            THUMB_SIZE, THUMB_SIZE, Qt.AspectRatioMode.KeepAspectRatio,
            Qt.TransformationMode.FastTransformation)
        tile.picture.setPixmap(picture)
        if thumb.note:
            tile.picture.setToolTip(f"Shown as the analysis read it: {thumb.note}")

    @Slot(object)
    def _on_thumbnail(self, key) -> None:
        tile = self._keys.get(key)
        thumb = self.maker.thumbnail(key)
        if tile is not None and thumb is not None:
            self._set_picture(tile, thumb)

    def shutdown(self, msecs: int = 3000) -> None:
        """Stop making thumbnails (waits for running jobs at most ``msecs``)."""
        self.maker.shutdown(msecs)

"""Tests of the off-thread thumbnail maker and its bounded LRU cache."""

from __future__ import annotations

import threading
import numpy as np
import pytest
from PIL import Image
from PySide6.QtCore import QThread
from PySide6.QtGui import QImage

from modescope.app.desktop.workers import thumbnails
from modescope.app.desktop.workers.thumbnails import (ThumbnailCache, ThumbnailMaker,
                                                      array_to_qimage, make_thumbnail)
from modescope.core.sources.decode import load_image, load_preview
from modescope.core.sources.scan import scan_sources


def _pixels(image: QImage) -> np.ndarray:
    """Read a QImage back as (rows, cols, 3) uint8 through QImage.pixelColor."""
    out = np.empty((image.height(), image.width(), 3), dtype=np.uint8)
    for r in range(image.height()):
        for c in range(image.width()):
            col = image.pixelColor(c, r)
            out[r, c] = (col.red(), col.green(), col.blue())
    return out


# ----- numpy -> QImage -------------------------------------------------------------------------
@pytest.mark.parametrize("shape", [(5, 7), (4, 5, 1), (3, 5, 3), (6, 9, 3)])
def test_array_to_qimage_round_trip(shape):
    rng = np.random.default_rng(3)
    a = rng.integers(0, 256, size=shape, dtype=np.uint8)
    img = array_to_qimage(a)
    assert (img.height(), img.width()) == shape[:2]
    got = _pixels(img)
    expect = (a if a.ndim == 3 and a.shape[2] == 3
              else np.repeat(a.reshape(shape[:2])[..., None], 3, 2)).copy()
    np.testing.assert_array_equal(got, expect)
    a[...] = 0  # the QImage owns its pixels
    np.testing.assert_array_equal(_pixels(img), expect)


def test_array_to_qimage_rejects():
    with pytest.raises(TypeError, match="uint8"):
        array_to_qimage(np.zeros((2, 2)))
    with pytest.raises(ValueError, match=r"\(2, 2, 2\)"):
        array_to_qimage(np.zeros((2, 2, 2), dtype=np.uint8))


# ----- making one thumbnail --------------------------------------------------------------------
def _smooth_rgb(rows: int, cols: int) -> np.ndarray:
    r, c = np.mgrid[0:rows, 0:cols]
    planes = [0.5 + 0.35 * np.sin(r / 17.0 + k) * np.cos(c / 23.0) for k in range(3)]
    return np.rint(np.dstack(planes) * 255).astype(np.uint8)


def test_make_thumbnail_from_file_is_the_core_preview(tmp_path):
    a = _smooth_rgb(90, 150)
    p = tmp_path / "a.png"
    Image.fromarray(a).save(p)
    t = make_thumbnail(str(p), size=64)
    assert t.source == "file" and t.note == ""
    # the core's reduced decode, rounded to 8 bits
    preview = load_preview(p, max_side=64)
    np.testing.assert_array_equal(_pixels(t.image),
                                  np.rint(np.clip(preview, 0, 1) * 255).astype(np.uint8))
    ref = Image.fromarray(a)
    ref.thumbnail((64, 64))  # outside reference: Pillow's own thumbnail of the same pixels
    assert (t.image.width(), t.image.height()) == ref.size == (64, 38)
    # a smooth picture: within 4 levels of Pillow's (another filter), rule of thumb
    assert np.max(np.abs(_pixels(t.image).astype(int) - np.asarray(ref).astype(int))) <= 4


def test_thumbnail_follows_exif_orientation(tmp_path):
    # stored 40 rows x 80 columns, shown a quarter turn clockwise: analysed 80 x 40
    stored = _smooth_rgb(40, 80)
    exif = Image.Exif()
    exif[0x0112] = 6
    p = tmp_path / "turned.jpg"
    Image.fromarray(stored).save(p, exif=exif, quality=95)
    sset = scan_sources([p], color="rgb")
    analysed = load_image(sset.images[0], sset)
    assert analysed.shape[:2] == (80, 40)
    t = make_thumbnail(str(p), size=64)
    assert (t.image.height(), t.image.width()) == (64, 32)      # the analysis's aspect
    # the left column of the shown image is the stored bottom row (numpy.rot90 reference)
    shown = _pixels(t.image).astype(int)
    turned = np.asarray(Image.fromarray(np.rot90(stored, -1)).resize((32, 64),
                                                                      Image.BILINEAR))
    assert np.max(np.abs(shown - turned.astype(int))) <= 6     # JPEG + filters, rule of thumb


def test_make_thumbnail_16_bit_and_pages(tmp_path):
    a = np.linspace(0, 65535, 40 * 30).reshape(30, 40).astype(np.uint16)
    p = tmp_path / "deep.png"
    Image.fromarray(a).save(p)
    t = make_thumbnail(str(p), size=64)
    got = _pixels(t.image)[:, :, 0].astype(int)
    expect = np.rint(a / 65535.0 * 255).astype(int)
    assert np.max(np.abs(got - expect)) <= 1
    # reduced: the same values as the analysis's area-average downscale (load_image), to
    # within the 8-bit rounding of the thumbnail (half a level, plus float32 rounding)
    big = np.kron(a, np.ones((4, 4), np.uint16))                  # 120 x 160
    Image.fromarray(big).save(p)
    t = make_thumbnail(str(p), size=40)
    sset = scan_sources([p])
    analysed = load_image(sset.images[0], sset, downscale=4)[:, :, 0]
    got = _pixels(t.image)[:, :, 0] / 255.0
    assert got.shape == analysed.shape == (30, 40)
    np.testing.assert_allclose(got, analysed, rtol=0, atol=0.5 / 255 + 1e-6)
    # second page of a two-page TIFF
    pages = [Image.fromarray(np.full((8, 8), v, dtype=np.uint8)) for v in (10, 200)]
    tif = tmp_path / "two.tif"
    pages[0].save(tif, save_all=True, append_images=pages[1:])
    assert _pixels(make_thumbnail(str(tif), page=1).image)[0, 0, 0] == 200


def test_make_thumbnail_missing_file(tmp_path):
    gone = str(tmp_path / "gone.png")
    t = make_thumbnail(gone)
    assert t.source == "failed" and t.image.isNull() and "gone.png" in t.note
    recon = np.full((10, 20, 1), 0.5, dtype=np.float32)
    t = make_thumbnail(gone, fallback=lambda: recon)
    assert t.source == "reconstruction" and "gone.png" in t.note
    assert (t.image.width(), t.image.height()) == (20, 10)
    assert _pixels(t.image)[3, 3, 0] == 128  # 0.5 * 255 rounded
    # values halfway between two 8-bit levels round as the exported files do (half to even)
    halves = ((np.arange(255) + 0.5) / 255).reshape(15, 17, 1)
    t = make_thumbnail(gone, size=64, fallback=lambda: halves)
    np.testing.assert_array_equal(_pixels(t.image)[:, :, 0], np.rint(halves[:, :, 0] * 255))


# ----- cache -----------------------------------------------------------------------------------
def test_cache_is_bounded_lru():
    c = ThumbnailCache(3)
    for i in range(5):
        c.put(i, f"v{i}")
    assert len(c) == 3 and [k in c for k in range(5)] == [False, False, True, True, True]
    assert c.get(2) == "v2"  # touching 2 makes 3 the oldest
    c.put(5, "v5")
    assert 3 not in c and all(k in c for k in (2, 4, 5))
    assert c.get(3, "none") == "none"
    # least recently used first: 4, then 2, then 5 leave as new entries come
    c.put(6, "v6")
    assert 4 not in c and all(k in c for k in (2, 5, 6))
    c.put(7, "v7")
    assert 2 not in c and all(k in c for k in (5, 6, 7))
    with pytest.raises(ValueError, match="at least 1"):
        ThumbnailCache(0)
    with pytest.raises(TypeError, match="integer"):
        ThumbnailCache(2.5)


# ----- the maker -------------------------------------------------------------------------------
def _write(tmp_path, n):
    paths = []
    for i in range(n):
        p = tmp_path / f"img_{i}.png"
        Image.fromarray(np.full((12, 16), 10 * i, dtype=np.uint8)).save(p)
        paths.append(str(p))
    return paths


def test_maker_works_off_the_gui_thread(qtbot, qapp, tmp_path, monkeypatch):
    seen = []
    real = thumbnails.make_thumbnail

    def recording(*args, **kwargs):
        seen.append(QThread.currentThread())
        return real(*args, **kwargs)

    monkeypatch.setattr(thumbnails, "make_thumbnail", recording)
    paths = _write(tmp_path, 3)
    maker = ThumbnailMaker(size=32)
    try:
        with qtbot.waitSignal(maker.thumbnailReady, timeout=5000) as blocker:
            assert maker.request(("a", 0), paths[2]) is None  # not cached yet
        assert blocker.args == [("a", 0)]
        assert seen and all(t is not qapp.thread() for t in seen)
        assert all(t != qapp.thread() for t in seen)
        thumb = maker.request(("a", 0), paths[2])  # now from the cache
        assert thumb.source == "file" and _pixels(thumb.image)[0, 0, 0] == 20
        assert thumb.icon.availableSizes()[0].toTuple() == (16, 12)  # made on the GUI thread
    finally:
        maker.shutdown()


def test_maker_cache_bound_and_newest_first(qtbot, tmp_path):
    paths = _write(tmp_path, 8)
    maker = ThumbnailMaker(size=16, cache_size=4, threads=1)
    try:
        got = []
        maker.thumbnailReady.connect(got.append)
        for i, p in enumerate(paths):
            maker.request(i, p)
            maker.request(i, p)  # a repeated request is not queued twice
        qtbot.waitUntil(lambda: len(got) == 8, timeout=5000)
        assert sorted(got) == list(range(8))
        assert len(maker.cache) == 4
        assert all(k in maker.cache for k in got[-4:])  # the last finished are kept
        assert maker.pending() == 0
    finally:
        maker.shutdown()


def test_maker_drops_oldest_pending_and_stops(qtbot, tmp_path, monkeypatch):
    paths = _write(tmp_path, 6)
    maker = ThumbnailMaker(size=16, threads=1, max_pending=2)
    maker.shutdown()  # stopped: nothing is queued any more
    assert maker.request(0, paths[0]) is None and maker.pending() == 0

    gate = threading.Event()
    started = threading.Event()
    real = thumbnails.make_thumbnail

    def blocking(*args, **kwargs):
        started.set()
        gate.wait(5)
        return real(*args, **kwargs)

    monkeypatch.setattr(thumbnails, "make_thumbnail", blocking)
    maker = ThumbnailMaker(size=16, threads=1, max_pending=2)
    got = []
    maker.thumbnailReady.connect(got.append)
    try:
        maker.request(0, paths[0])
        assert started.wait(5)  # image 0 is being made; the next ones queue up
        for i in range(1, 6):
            maker.request(i, paths[i])
        assert maker.pending() == 3  # 1 being made + max_pending newest (4 and 5)
        gate.set()
        qtbot.waitUntil(lambda: maker.pending() == 0, timeout=5000)
        qtbot.waitUntil(lambda: len(got) == 3, timeout=5000)
        assert got == [0, 5, 4]  # newest first; 1..3 were dropped
        maker.request(2, paths[2])  # a dropped one can be asked for again
        qtbot.waitUntil(lambda: 2 in maker.cache, timeout=5000)
    finally:
        gate.set()
        maker.shutdown()

"""The spill file that carries decoded blocks from the learning pass to the scoring pass."""

import numpy as np
import pytest
from PIL import Image

from modescope.core.engine import blockcache
from modescope.core.engine.blockcache import BlockCache
from modescope.core.engine.pipeline import AnalysisOptions, analyze
from modescope.core.sources.decode import iter_blocks
from modescope.core.sources.scan import scan_sources


def write(folder, kind, count=20, size=(12, 10), seed=0):
    rng = np.random.default_rng(seed)
    folder.mkdir(parents=True, exist_ok=True)
    for i in range(count):
        if kind == "gray":
            img = Image.fromarray(rng.integers(0, 256, size, dtype=np.uint8))
        elif kind == "rgb":
            img = Image.fromarray(rng.integers(0, 256, size + (3,), dtype=np.uint8))
        else:  # 16-bit gray
            img = Image.fromarray(rng.integers(0, 65536, size, dtype=np.uint16))
        img.save(folder / f"f_{i}.png")
    return folder


@pytest.mark.parametrize("kind, color, exact8", [
    ("gray", "gray", True),      # 8-bit gray used as stored
    ("rgb", "rgb", True),        # 8-bit RGB used as stored
    ("gray", "rgb", True),       # gray repeated in three channels: still v / 255
    ("rgb", "gray", False),      # luma mix: not 8-bit values any more, stored as float32
    ("gray16", "gray", False),   # 16-bit: v / 65535, stored as float32
])
@pytest.mark.parametrize("keep_raw", [False, True])
def test_round_trip_is_bit_exact(tmp_path, kind, color, exact8, keep_raw):
    folder = write(tmp_path / kind, kind)
    sset = scan_sources([folder], color=color)
    blocks = list(iter_blocks(sset, block_size=6, keep_raw=keep_raw))
    assert all(b.exact8 is exact8 for b in blocks)
    for b in blocks:
        if keep_raw and exact8:
            # the decoder's copy of the stored values restores its floats exactly
            assert b.raw8.dtype == np.uint8 and b.raw8.shape == b.data.T.shape
            assert np.array_equal(np.divide(b.raw8, np.float32(255), dtype=np.float32),
                                  b.data.T)
        else:
            assert b.raw8 is None
    with BlockCache(blocks[0].data.shape[0], budget=1 << 30) as cache:
        for b in blocks:
            assert cache.put(b)
        assert cache.images == 20
        # uint8 storage takes a quarter of float32
        assert cache.size == 20 * blocks[0].data.shape[0] * (1 if exact8 else 4)
        back = list(cache.blocks())
    assert len(back) == len(blocks)
    for a, b in zip(blocks, back):
        assert np.array_equal(a.indices, b.indices) and a.start == b.start
        assert b.data.dtype == np.float32 and b.data.shape == a.data.shape
        assert np.array_equal(a.data, b.data)        # bit for bit, not merely close


def test_budget_keeps_a_prefix_and_stops(tmp_path):
    folder = write(tmp_path / "g", "gray")
    sset = scan_sources([folder])
    blocks = list(iter_blocks(sset, block_size=5))
    pixels = blocks[0].data.shape[0]
    with BlockCache(pixels, budget=pixels * 12) as cache:   # room for two blocks of five
        results = [cache.put(b) for b in blocks]
        assert results == [True, True, False, False]
        assert cache.full and cache.images == 10
        assert [b.start for b in cache.blocks()] == [0, 5]


def test_zero_budget_and_unwritable_folder_disable_the_cache(tmp_path):
    folder = write(tmp_path / "g", "gray", count=4)
    block = next(iter_blocks(scan_sources([folder]), block_size=4))
    with BlockCache(block.data.shape[0], budget=0) as cache:
        assert not cache.put(block) and cache.images == 0
        assert list(cache.blocks()) == []
    with BlockCache(block.data.shape[0], budget=1 << 20,
                    folder=str(tmp_path / "no_such_folder")) as cache:
        assert not cache.put(block) and cache.full


def _fail_write(monkeypatch, nth: int) -> list:
    """Make the cache's ``nth`` block write fail as on a full disk; return the calls made."""
    real = BlockCache._write
    calls = []

    def failing(self, payload):
        calls.append(1)
        if len(calls) == nth:
            raise OSError(28, "No space left on device")
        real(self, payload)

    monkeypatch.setattr(BlockCache, "_write", failing)
    return calls


def test_a_failed_write_keeps_the_blocks_before_it(tmp_path, monkeypatch):
    # the writes run in a thread of their own: a full disk on the third block is found when
    # the cache is read, and only the first two blocks are kept (bit for bit)
    folder = write(tmp_path / "g", "gray")
    sset = scan_sources([folder])
    blocks = list(iter_blocks(sset, block_size=5))
    _fail_write(monkeypatch, 3)
    with BlockCache(blocks[0].data.shape[0], budget=1 << 20) as cache:
        assert all(cache.put(b) for b in blocks)          # not known yet when putting
        assert cache.images == 10 and cache.full           # known once settled
        back = list(cache.blocks())
        assert [b.start for b in back] == [0, 5]
        for a, b in zip(blocks, back):
            assert np.array_equal(a.data, b.data)
        assert not cache.put(blocks[0])                    # caching stopped


def test_analysis_survives_a_failed_cache_write(tmp_path, monkeypatch):
    # the passes read the blocks before the failure from the cache and the rest from the
    # files: the same model as without any cache (reference: budget 0)
    folder = write(tmp_path / "g", "gray", count=30)
    opts = AnalysisOptions(rank=3, block_size=4)
    monkeypatch.setattr(blockcache, "default_budget", lambda folder=None: 0)
    plain = analyze([folder], opts).decomposition
    monkeypatch.setattr(blockcache, "default_budget", lambda folder=None: 1 << 30)
    calls = _fail_write(monkeypatch, 5)
    d = analyze([folder], opts).decomposition
    assert len(calls) >= 5
    np.testing.assert_array_equal(d.singular_values, plain.singular_values)
    np.testing.assert_array_equal(d.weights, plain.weights)


def test_default_budget_is_bounded(tmp_path):
    budget = blockcache.default_budget(str(tmp_path))
    assert 0 <= budget <= 2 * (1 << 30)
    assert blockcache.default_budget(str(tmp_path / "missing")) == 0


@pytest.mark.parametrize("budget", ["none", "prefix"])
def test_analysis_is_identical_with_and_without_the_cache(tmp_path, monkeypatch, budget):
    # the cache is an optimisation only: the scoring pass must see the very same numbers
    folder = write(tmp_path / "g", "gray", count=50, size=(16, 12), seed=3)
    options = AnalysisOptions(rank=6, block_size=8)
    with_cache = analyze([folder], options).decomposition
    pixels = 16 * 12
    limit = 0 if budget == "none" else pixels * 20        # nothing, or the first 2 blocks
    monkeypatch.setattr(blockcache, "default_budget", lambda folder=None: limit)
    without = analyze([folder], options).decomposition
    assert with_cache.exact and without.exact
    # same data, so equal up to the rounding of products over blocks of another width
    for name in ("mean", "basis", "singular_values", "weights", "residual"):
        a, b = getattr(with_cache, name), getattr(without, name)
        np.testing.assert_allclose(a, b, rtol=1e-5, atol=1e-6 * np.max(np.abs(b)), err_msg=name)
    assert with_cache.total_energy == without.total_energy


def test_raw_values_follow_failed_images_out(tmp_path):
    folder = write(tmp_path / "g", "gray", count=8)
    (folder / "f_3.png").write_bytes(b"not a png at all")
    sset = scan_sources([folder])            # the broken file is already a scan problem
    (folder / "f_5.png").write_bytes((folder / "f_5.png").read_bytes()[:60])  # truncated later
    blocks = list(iter_blocks(sset, block_size=8, keep_raw=True))
    assert len(blocks) == 1 and len(blocks[0].problems) == 1
    b = blocks[0]
    assert b.raw8.shape == (b.data.shape[1], b.data.shape[0])
    assert np.array_equal(np.divide(b.raw8, np.float32(255), dtype=np.float32), b.data.T)


@pytest.mark.parametrize("budget", ["default", "none", "prefix"])
def test_update_reads_new_images_back_from_the_cache(tmp_path, monkeypatch, budget):
    # update_analysis scores old images from their files and new ones from the cache; the
    # result must not depend on how much was cached
    from modescope.core.engine.pipeline import update_analysis
    old = write(tmp_path / "old", "gray", count=30, size=(16, 12), seed=5)
    new = tmp_path / "new"
    new.mkdir()
    rng = np.random.default_rng(6)
    for i in range(21):
        Image.fromarray(rng.integers(0, 256, (16, 12), dtype=np.uint8)).save(new / f"n_{i}.png")
    options = AnalysisOptions(rank=5, block_size=8)
    base = analyze([old], options).decomposition
    reference = update_analysis(base, [new], options).decomposition
    if budget != "default":
        limit = 0 if budget == "none" else 16 * 12 * 8        # nothing, or the first block
        monkeypatch.setattr(blockcache, "default_budget", lambda folder=None: limit)
    result = update_analysis(base, [new], options).decomposition
    assert result.exact and result.n_images == 51
    for name in ("singular_values", "weights", "residual"):
        a, b = getattr(result, name), getattr(reference, name)
        np.testing.assert_allclose(a, b, rtol=1e-5, atol=1e-6 * np.max(np.abs(b)), err_msg=name)
    # and the exact pass equals a fresh look at all 51 images through the same basis
    from modescope.core.engine.pipeline import project_images
    cols = np.concatenate([b.data for b in iter_blocks(scan_sources([old, new]), block_size=64)],
                          axis=1)
    w, res = project_images(result, cols)
    np.testing.assert_allclose(result.weights, w, rtol=1e-4, atol=1e-5 * np.max(np.abs(w)))


def test_budget_is_smaller_in_memory_backed_folders(tmp_path, monkeypatch):
    import os
    import shutil
    ram = tmp_path / "ram"
    (ram / "deep").mkdir(parents=True)
    mounts = tmp_path / "mounts"
    mounts.write_text(f"/dev/root / ext4 rw 0 0\n"
                      f"tmpfs {os.path.realpath(ram)} tmpfs rw 0 0\n")
    # the longest mount point that holds the folder decides
    assert blockcache._in_memory_filesystem(str(ram / "deep"), str(mounts))
    assert not blockcache._in_memory_filesystem(str(tmp_path), str(mounts))
    assert not blockcache._in_memory_filesystem(str(tmp_path), str(tmp_path / "none"))
    usage = type(shutil.disk_usage(tmp_path))
    for free, in_memory, expected in ((64 << 30, True, 1 << 29), (64 << 30, False, 2 << 30),
                                      (1 << 30, True, (1 << 30) // 8),
                                      (1 << 30, False, (1 << 30) // 4)):
        monkeypatch.setattr(blockcache.shutil, "disk_usage",
                            lambda folder, f=free: usage(f * 2, f, f))
        monkeypatch.setattr(blockcache, "_in_memory_filesystem",
                            lambda folder, m=in_memory: m)
        assert blockcache.default_budget(str(tmp_path)) == expected

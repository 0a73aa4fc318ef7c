"""Live rank-r reconstruction of one image, updated incrementally as the rank changes.

Moving the rank from r1 to r2 adds (or removes) only the modes in between:
``x_r2 = x_r1 + basis[:, r1:r2] @ weights[r1:r2]``, so one slider step costs one pass over the
pixels instead of r of them (a 512x512 RGB image at k = 200: one step is ~0.8 M multiply-adds
instead of ~160 M). Rounding from many small steps is bounded by re-computing from scratch when
the number of modes added or removed since the last full computation exceeds a limit.
"""

from __future__ import annotations

import numpy as np

from modescope.core.validation import check_int
from modescope.core.decomposition import Decomposition

__all__ = ["LiveReconstruction"]


class LiveReconstruction:
    """Reconstruction of image ``index`` of ``decomposition`` at any rank, cheaply re-ranked.

    Parameters
    ----------
    decomposition : Decomposition
    index : int
        Image column, 0 <= index < n_images.
    refresh_after : int, optional
        Recompute from scratch after this many modes were added or removed incrementally
        (default 256), which keeps float32 rounding at the level of one full computation.

    Examples
    --------
    >>> live = LiveReconstruction(decomposition, 3)          # doctest: +SKIP
    >>> image = live.at(10)                                   # doctest: +SKIP
    """

    def __init__(self, decomposition: Decomposition, index: int, refresh_after: int = 256):
        if not isinstance(decomposition, Decomposition):
            raise TypeError(f"decomposition must be a Decomposition, got "
                            f"{type(decomposition).__name__}")
        self.decomposition = decomposition
        self.index = check_int("index", index, minimum=0, maximum=decomposition.n_images - 1)
        self.refresh_after = check_int("refresh_after", refresh_after, minimum=1)
        self._w = decomposition.weights[:, self.index].astype(np.float32)
        self._rank = 0
        self._vector = decomposition.mean.astype(np.float32).copy()
        self._steps = 0

    @property
    def rank(self) -> int:
        """Rank of the reconstruction held now."""
        return self._rank

    def at(self, rank: int) -> np.ndarray:
        """Return the rank-``rank`` reconstruction as a raveled pixel vector (not clipped).

        The returned array is owned by this object and changes on the next call; copy it to keep
        it.
        """
        d = self.decomposition
        rank = check_int("rank", rank, minimum=0, maximum=d.rank)
        if rank == self._rank:
            return self._vector
        lo, hi = sorted((self._rank, rank))
        self._steps += hi - lo
        if self._steps > self.refresh_after or hi - lo > rank:
            # from scratch (also when it is cheaper than the increment)
            self._vector = d.mean + d.basis[:, :rank] @ self._w[:rank]
            self._steps = 0
        else:
            delta = d.basis[:, lo:hi] @ self._w[lo:hi]
            if rank > self._rank:
                self._vector += delta
            else:
                self._vector -= delta
        self._rank = rank
        return self._vector

    def image_at(self, rank: int) -> np.ndarray:
        """Return the reconstruction at ``rank`` shaped ``(rows, cols, channels)``."""
        return self.at(rank).reshape(self.decomposition.image_shape)

    def residual_image(self, image, rank: int) -> np.ndarray:
        """Return the image minus its rank-``rank`` reconstruction, pixel by pixel.

        Parameters
        ----------
        image : array_like, shape (rows, cols, channels) or (pixels,)
            The image itself at analysis resolution (e.g.
            :func:`modescope.core.engine.pipeline.load_analysis_image`), values in [0, 1].
        rank : int
            Modes used, 0..k.

        Returns
        -------
        ndarray, shape (rows, cols, channels), float32
            ``image - reconstruction``: positive where the image is brighter than its
            reconstruction. A new array (not owned by this object). For the analysed image
            of a final analysis, the sum of its squares is the image's residual at ``rank``
            (:meth:`Decomposition.residual_at_rank
            <modescope.core.decomposition.Decomposition.residual_at_rank>` with ``index``) up
            to float32 rounding.

        Raises
        ------
        TypeError
            If ``image`` is not numeric or ``rank`` not an integer.
        ValueError
            If ``image`` has another number of pixel values than the analysis, or ``rank`` is
            out of range.
        """
        arr = np.asarray(image)
        if not (np.issubdtype(arr.dtype, np.number) or arr.dtype == np.bool_):
            raise TypeError(f"image must be a numeric array, got dtype {arr.dtype}")
        shape = tuple(self.decomposition.image_shape)
        if arr.shape not in (shape, (self.decomposition.n_pixels,)):
            raise ValueError(f"image must have shape {shape} or ({self.decomposition.n_pixels},) "
                             f"as the analysis, got {arr.shape}")
        vector = self.at(rank)
        return np.subtract(arr.reshape(shape), vector.reshape(shape), dtype=np.float32)

"""How accurate an analysis' singular values are: the certificate in words.

Every front end (command line, desktop program) shows the same sentence, made here.
"""

from __future__ import annotations

import numpy as np

from modescope.core.decomposition import Decomposition

__all__ = ["DEFAULT_TOLERANCE", "model_tolerance", "is_certified_exact", "describe_accuracy"]

#: Relative accuracy asked of every singular value unless the analysis stored another.
DEFAULT_TOLERANCE = 1e-4


def model_tolerance(decomposition: Decomposition) -> float:
    """Return the tolerance the analysis was refined to (its options), else the default."""
    options = decomposition.metadata.get("options", {})
    value = options.get("tolerance", DEFAULT_TOLERANCE) if isinstance(options, dict) else None
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not 0 < value < 1:
        return DEFAULT_TOLERANCE
    return float(value)


def is_certified_exact(decomposition: Decomposition, tolerance: float | None = None) -> bool:
    """Return True when every singular value's certified bound is within the tolerance.

    Parameters
    ----------
    decomposition : Decomposition
    tolerance : float, optional
        Relative tolerance; default: the analysis' own (:func:`model_tolerance`).
    """
    if decomposition.singular_value_error is None or not decomposition.exact:
        return False
    tol = model_tolerance(decomposition) if tolerance is None else float(tolerance)
    return decomposition.unconverged_modes(tol).size == 0


def describe_accuracy(decomposition: Decomposition, tolerance: float | None = None) -> str:
    """Return one sentence on how accurate the singular values are.

    Parameters
    ----------
    decomposition : Decomposition
    tolerance : float, optional
        Relative tolerance; default: the analysis' own.

    Returns
    -------
    str

    Examples
    --------
    >>> import numpy as np
    >>> d = Decomposition(mean=np.zeros(2, np.float32), basis=np.eye(2, 1, dtype=np.float32),
    ...                   singular_values=np.array([2.0]), weights=np.array([[1.0, -1.0]]),
    ...                   total_energy=2.0, image_shape=(2, 1, 1), residual=np.zeros(2),
    ...                   exact=True, singular_value_error=np.array([1e-9]))
    >>> describe_accuracy(d)
    'exact: every singular value is certified within 0.01 % (largest bound 5e-08 % of its value)'
    """
    d = decomposition
    tol = model_tolerance(d) if tolerance is None else float(tolerance)
    if not d.rank:
        return "no singular values (the images do not vary)"
    if not d.exact:
        return "streaming snapshot: singular values not yet certified (no refinement pass)"
    if d.singular_value_error is None:
        return "scored without a certificate (no refinement, or written by an older version)"
    with np.errstate(divide="ignore", invalid="ignore"):
        rel = np.where(d.singular_values > 0, d.singular_value_error / d.singular_values, np.inf)
    bad = d.unconverged_modes(tol)
    if bad.size == 0:
        return (f"exact: every singular value is certified within {100 * tol:g} % "
                f"(largest bound {100 * float(np.max(rel)):.1g} % of its value)")
    modes = _ranges(bad + 1)
    return (f"not converged: modes {modes} are certified only within "
            f"{100 * float(np.max(rel[bad])):.2g} % (asked {100 * tol:g} %); the other "
            f"{d.rank - bad.size} are within it. More passes (--max-passes) or more "
            f"oversampling (--oversample) would tighten them")


def _ranges(numbers) -> str:
    """Return ``"3, 7-9"`` for [3, 7, 8, 9]."""
    numbers = [int(n) for n in numbers]
    parts, start = [], numbers[0]
    for prev, cur in zip(numbers, numbers[1:] + [None]):
        if cur != prev + 1 if cur is not None else True:
            parts.append(str(start) if start == prev else f"{start}-{prev}")
            start = cur
    return ", ".join(parts)

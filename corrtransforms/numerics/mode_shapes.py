"""Mode shape helpers: the modal assurance criterion and a normalisation that makes shapes comparable.

A mode shape from output-only identification is known up to a complex factor. Two conventions
make shapes of different windows comparable:

- :func:`modal_assurance_criterion` (MAC) is invariant to that factor: 1 for collinear shapes,
  0 for orthogonal ones;
- :func:`normalise_shape` divides a shape by one of its components, by default the component of
  largest modulus, so that component is exactly ``1 + 0j``. For tracking, every window's shape is
  divided by the component that is largest in the *reference* (baseline) shape, so the same
  channel carries the 1 in every window and the other components can be compared one by one.
"""

from __future__ import annotations

from typing import Optional

import numpy as np


def modal_assurance_criterion(shapes_a, shapes_b) -> np.ndarray:
    """MAC between every shape of one set and every shape of another.

    Parameters
    ----------
    shapes_a : array_like, shape (n_channels,) or (p, n_channels), real or complex
    shapes_b : array_like, shape (n_channels,) or (q, n_channels)

    Returns
    -------
    ndarray, shape (p, q) (a float for two single shapes)
        ``MAC(a, b) = |a^H b|^2 / ((a^H a) (b^H b))`` in ``[0, 1]``; NaN where a shape is all
        zero or holds a non-finite component.

    References
    ----------
    .. [1] R. J. Allemang and D. L. Brown, "A correlation coefficient for modal vector analysis",
       Proc. 1st International Modal Analysis Conference, 110-116, 1982 (the definition above;
       complex shapes with the conjugate transpose, from memory).

    Examples
    --------
    >>> float(modal_assurance_criterion([1.0, 0.0], [1.0, 1.0]))
    0.5
    """
    a = np.asarray(shapes_a)
    b = np.asarray(shapes_b)
    single = a.ndim == 1 and b.ndim == 1
    a2 = np.atleast_2d(a).astype(complex)
    b2 = np.atleast_2d(b).astype(complex)
    if a2.shape[-1] != b2.shape[-1]:
        raise ValueError(f"shapes have {a2.shape[-1]} and {b2.shape[-1]} components: must be equal")
    cross = np.abs(np.conj(a2) @ b2.T) ** 2
    norm_a = np.sum(np.abs(a2) ** 2, axis=1)
    norm_b = np.sum(np.abs(b2) ** 2, axis=1)
    denominator = norm_a[:, None] * norm_b[None, :]
    with np.errstate(invalid="ignore", divide="ignore"):
        mac = np.where(denominator > 0, cross / np.where(denominator > 0, denominator, 1.0), np.nan)
    mac = np.minimum(mac, 1.0)  # rounding: |a^H b|^2 <= (a^H a)(b^H b) (Cauchy-Schwarz)
    return mac[0, 0] if single else mac


def largest_component(shape) -> int:
    """Index of the component of largest modulus (the first one on ties)."""
    return int(np.argmax(np.abs(np.asarray(shape))))


def normalise_shape(shapes, reference_index: Optional[int] = None) -> np.ndarray:
    """Shapes divided by one component each, so that component is exactly ``1 + 0j``.

    Parameters
    ----------
    shapes : array_like, shape (n_channels,) or (..., n_channels), complex
    reference_index : int, optional
        The component set to 1 in every shape. None (the default) means each shape's own
        :func:`largest_component`; for tracking pass the largest component of the reference
        shape, so every window puts the 1 on the same channel.

    Returns
    -------
    ndarray of complex, same shape
        NaN for a shape whose chosen component is 0.
    """
    phi = np.asarray(shapes, dtype=complex)
    if reference_index is None:
        index = np.argmax(np.abs(phi), axis=-1)
    else:
        if not -phi.shape[-1] <= reference_index < phi.shape[-1]:
            raise ValueError(f"reference_index={reference_index}: must be in 0..{phi.shape[-1] - 1}")
        index = np.full(phi.shape[:-1], reference_index)
    pivot = np.take_along_axis(phi, np.asarray(index)[..., None], axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        out = np.where(pivot != 0, phi / np.where(pivot != 0, pivot, 1.0), np.nan + 0j)
    np.put_along_axis(out, np.asarray(index)[..., None], np.where(pivot != 0, 1.0 + 0j, np.nan + 0j), axis=-1)
    return out

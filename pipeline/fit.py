"""Power-law fits of a rate against system size: ``gap ~ A L^{-z}``.

Least squares on ``log gap = log A - z log L`` (optionally with the leading finite-size
correction ``+ c L^{-omega}``, still linear in the unknowns), with the standard error of ``z``
from the residuals: ``se(z)^2 = s^2 [(X^T X)^{-1}]_zz``, ``s^2 = RSS / (n - p)`` (common
practice: ordinary least squares, e.g. Press et al. 2007, Numerical Recipes, 3rd ed., ch.
15.4). The residuals of a finite-size fit are systematic, not noise: the standard error then
measures how well the form fits the sizes used, and the fit range is stated with it.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np

from pipeline.errors import GaplineError

__all__ = ["PowerLawFit", "fit_power_law"]


@dataclass(frozen=True)
class PowerLawFit:
    """``value ~ amplitude * L^{-z}`` (times ``1 + c L^{-omega}`` when ``omega`` is set)."""

    z: float
    z_stderr: float
    amplitude: float
    sizes: tuple[float, ...]  # the fit range: every size used
    points: int
    omega: float | None = None  # exponent of the correction term, or None
    correction: float | None = None  # its coefficient c (log scale)
    residual_rms: float = 0.0  # of log(value)

    def as_dict(self) -> dict:
        data = asdict(self)
        data["fit_range"] = [min(self.sizes), max(self.sizes)]
        return data

    def prediction(self, sizes: np.ndarray) -> np.ndarray:
        sizes = np.asarray(sizes, dtype=float)
        log_value = np.log(self.amplitude) - self.z * np.log(sizes)
        if self.omega is not None:
            log_value = log_value + self.correction * sizes ** (-self.omega)
        return np.exp(log_value)


def fit_power_law(sizes, values, omega: float | None = None) -> PowerLawFit:
    """Fit ``values ~ A sizes^{-z}`` by least squares on log-log axes.

    ``sizes`` and ``values`` are positive 1D arrays of one length; points with a
    non-positive or non-finite value are an error (a gap of zero has no exponent).
    ``omega`` adds the correction term ``c sizes^{-omega}`` to ``log values``.
    """
    L = np.asarray(sizes, dtype=float)
    y = np.asarray(values, dtype=float)
    if L.shape != y.shape or L.ndim != 1:
        raise GaplineError("fit: sizes and values must be 1D arrays of one length")
    columns = 2 if omega is None else 3
    if L.size < columns + 1:
        raise GaplineError(f"fit: needs at least {columns + 1} sizes for a standard error, "
                           f"got {L.size}; fix: sweep more sizes")
    if not (np.all(np.isfinite(y)) and np.all(y > 0) and np.all(L > 0)):
        raise GaplineError("fit: every size and value must be positive and finite")
    if np.unique(L).size < columns:
        raise GaplineError("fit: needs distinct sizes")
    design = [-np.log(L), np.ones_like(L)]
    if omega is not None:
        design.append(L ** (-omega))
    X = np.column_stack(design)
    coefficients, *_ = np.linalg.lstsq(X, np.log(y), rcond=None)
    residuals = np.log(y) - X @ coefficients
    dof = L.size - columns
    variance = float(residuals @ residuals) / dof
    covariance = variance * np.linalg.inv(X.T @ X)
    return PowerLawFit(
        z=float(coefficients[0]),
        z_stderr=float(np.sqrt(covariance[0, 0])),
        amplitude=float(np.exp(coefficients[1])),
        sizes=tuple(float(v) for v in np.sort(L)),
        points=int(L.size),
        omega=omega,
        correction=float(coefficients[2]) if omega is not None else None,
        residual_rms=float(np.sqrt(np.mean(residuals**2))),
    )

"""Fit a :class:`~acquire.core.force.ForceModel` from labelled holds.

Each hold is a steady state: mean segment curvature, mean shape, actuation p
and the known external force (a load cell's reading, usually along +y of the
base frame). Per segment k the moment balance
``EI_k (kappa_k - sum_i c_ki p**i) = Mbar_k(F)`` rearranges to

    kappa_k = c_k1 p + c_k2 p**2 + Mbar_k / EI_k,

linear in ``(c_k1, [c_k2], 1/EI_k)``: one least-squares problem per segment,
one row per hold. Stiffness is separable from actuation only when the holds
vary force and actuation independently; the report measures that per segment
(``separation``: the fraction of the moment column not explained by the
actuation columns) and warns when it is small. It refuses (one-line
:class:`ForceCalibrationError`) when nothing useful can be fitted.

The report's leave-one-hold-out error fits without hold j, estimates hold j's
force with that model and compares with its label: the error to expect on a
new hold like those in the set.

Threads: pure, any thread. Returned arrays are new, owned by the caller.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .force import (
    DEFAULT_AXIAL_PRIOR_SIGMA_N,
    DEFAULT_CURVATURE_NOISE_PER_M,
    ForceEstimator,
    ForceModel,
    segment_moment_arms,
)

__all__ = ["ForceCalibrationError", "ForceHold", "ForceFitReport", "fit_force_model"]

# Below this fraction of the moment column independent of the actuation
# columns, 1/EI's error is amplified more than 20 times. Common practice, no source.
DEFAULT_SEPARATION_WARN = 0.05


class ForceCalibrationError(ValueError):
    """Nothing useful can be fitted from these holds (one-line message)."""


@dataclass(frozen=True)
class ForceHold:
    """One labelled steady state.

    Parameters
    ----------
    curvature_per_m : array_like, shape (S,)
        Mean segment curvature over the hold, 1/m.
    xy_m : array_like, shape (P, 2)
        Mean shape points, m, base frame.
    s_m : array_like, shape (P,)
        Their arc lengths, m (0 to at least the sensor length).
    actuation : float
        Actuation p, in the unit the model will use.
    force_n : array_like, shape (2,)
        Known external force (Fx, Fy), N, base frame.
    contact_s_m : float, optional
        Contact point, m; default the sensor's far end.
    """

    curvature_per_m: np.ndarray
    xy_m: np.ndarray
    s_m: np.ndarray
    actuation: float
    force_n: np.ndarray
    contact_s_m: float | None = None


@dataclass(frozen=True)
class ForceFitReport:
    """What the fit found and how far to trust it.

    Attributes
    ----------
    ei_n_m2 : ndarray, shape (S,)
        Fitted stiffness, N m^2.
    free_curvature_coeffs : ndarray, shape (S, D)
        Fitted free-curvature coefficients (``a_k`` in column 0), 1/m per unit**i.
    residual_rms_per_m : ndarray, shape (S,)
        RMS curvature residual of each segment's fit, 1/m.
    separation : ndarray, shape (S,)
        Fraction (0..1) of the moment column not explained by the actuation columns.
    condition : ndarray, shape (S,)
        Condition number of the column-normalised design matrix.
    loo_force_error_n : ndarray, shape (H,)
        Leave-one-hold-out error ``|F_est - F_label|`` per hold, N (NaN: no fit without it).
    loo_normal_error_n : ndarray, shape (H,)
        The same for the normal component only, N.
    loo_rms_n, loo_max_n : float
        RMS and largest of ``loo_force_error_n``, N.
    force_range_n : float
        Largest minus smallest label magnitude, N.
    loo_rms_percent : float
        ``loo_rms_n`` in % of ``force_range_n``.
    warnings : tuple of str
    """

    ei_n_m2: np.ndarray
    free_curvature_coeffs: np.ndarray
    residual_rms_per_m: np.ndarray
    separation: np.ndarray
    condition: np.ndarray
    loo_force_error_n: np.ndarray
    loo_normal_error_n: np.ndarray
    loo_rms_n: float
    loo_max_n: float
    force_range_n: float
    loo_rms_percent: float
    warnings: tuple

    def lines(self) -> list[str]:
        """Human-readable summary, one string per line."""
        out = ["segment  EI N m^2    a 1/m/unit   rms 1/m   separation"]
        for k, ei in enumerate(self.ei_n_m2):
            out.append(
                f"{k:7d}  {ei:10.4g}  {self.free_curvature_coeffs[k, 0]:11.4g}  "
                f"{self.residual_rms_per_m[k]:8.3g}  {self.separation[k]:10.3f}"
            )
        out.append(
            f"leave-one-out force error: rms {self.loo_rms_n:.3g} N, max {self.loo_max_n:.3g} N "
            f"({self.loo_rms_percent:.2g} % of {self.force_range_n:.3g} N range)"
        )
        out.extend(f"warning: {w}" for w in self.warnings)
        return out


@dataclass
class _Rows:
    """Per-hold quantities the fit needs, computed once."""

    kappa: np.ndarray  # (H, S)
    p: np.ndarray  # (H,)
    moment: np.ndarray  # (H, S) Mbar_k, N m
    force: np.ndarray  # (H, 2)


def _prepare(holds, lengths: np.ndarray, quadrature: str) -> _Rows:
    n_seg = lengths.size
    kappa, p, moment, force = [], [], [], []
    for j, h in enumerate(holds):
        if not isinstance(h, ForceHold):
            raise ForceCalibrationError(f"hold {j}: expected a ForceHold, got {type(h).__name__}")
        k = np.asarray(h.curvature_per_m, dtype=np.float64).reshape(-1)
        f = np.asarray(h.force_n, dtype=np.float64).reshape(-1)
        if k.size != n_seg or f.size != 2 or not np.all(np.isfinite(k)) or not np.all(np.isfinite(f)):
            raise ForceCalibrationError(f"hold {j}: needs {n_seg} finite curvatures and a finite (Fx, Fy)")
        try:
            p_j = float(h.actuation)
        except (TypeError, ValueError):
            p_j = float("nan")
        if not np.isfinite(p_j):
            raise ForceCalibrationError(f"hold {j}: actuation is not a finite number")
        try:
            a, b, _t = segment_moment_arms(h.xy_m, h.s_m, segment_lengths_m=lengths,
                                           contact_s_m=h.contact_s_m, quadrature=quadrature)
        except ValueError as exc:
            raise ForceCalibrationError(f"hold {j}: {exc}") from None
        if not np.all(np.isfinite(a) & np.isfinite(b)):
            raise ForceCalibrationError(f"hold {j}: shape points are not finite")
        kappa.append(k)
        p.append(p_j)
        moment.append(f[1] * a[0] - f[0] * b[0])
        force.append(f)
    return _Rows(np.array(kappa), np.array(p), np.array(moment), np.array(force))


def _refuse_if_hopeless(rows: _Rows, degree: int) -> None:
    n = rows.p.size
    if n < degree + 1:
        raise ForceCalibrationError(f"{n} holds, fewer than the {degree + 1} unknowns per segment")
    if not np.any(np.hypot(rows.force[:, 0], rows.force[:, 1]) > 0):
        raise ForceCalibrationError("no loaded holds: every label force is zero, stiffness cannot be fitted")
    levels = np.unique(rows.p)
    if levels.size < 2:
        raise ForceCalibrationError(f"all holds at one actuation level ({levels[0]:g}); need at least two")
    if np.count_nonzero(levels) < degree:
        raise ForceCalibrationError(f"degree {degree} needs holds at {degree} or more nonzero actuation levels")


def _fit_segments(rows: _Rows, degree: int):
    """Per-segment least squares -> (ei, coeffs, rms, separation, condition); raises when EI <= 0."""
    n_seg = rows.kappa.shape[1]
    act = rows.p[:, None] ** np.arange(1, degree + 1)  # (H, D)
    ei, coeffs = np.empty(n_seg), np.empty((n_seg, degree))
    rms, sep, cond = np.empty(n_seg), np.empty(n_seg), np.empty(n_seg)
    for k in range(n_seg):
        m = rows.moment[:, k]
        m_norm = np.linalg.norm(m)
        if not m_norm > 0:
            raise ForceCalibrationError(f"segment {k}: no hold puts a moment on it (contact before it?)")
        x = np.column_stack([act, m])
        beta, *_ = np.linalg.lstsq(x, rows.kappa[:, k], rcond=None)
        if not beta[-1] > 0:
            raise ForceCalibrationError(
                f"segment {k}: fitted stiffness is not positive (1/EI = {beta[-1]:.3g}); check the force signs")
        ei[k], coeffs[k] = 1.0 / beta[-1], beta[:-1]
        rms[k] = np.sqrt(np.mean((rows.kappa[:, k] - x @ beta) ** 2))
        proj, *_ = np.linalg.lstsq(act, m, rcond=None)
        sep[k] = np.linalg.norm(m - act @ proj) / m_norm
        cond[k] = np.linalg.cond(x / np.linalg.norm(x, axis=0))
    return ei, coeffs, rms, sep, cond


def _subset(rows: _Rows, keep: np.ndarray) -> _Rows:
    return _Rows(rows.kappa[keep], rows.p[keep], rows.moment[keep], rows.force[keep])


def _leave_one_out(holds, rows, lengths, degree, unit, quadrature, estimator_options):
    """Per-hold (vector, normal) error of the force estimated by a model fitted without it."""
    n = rows.p.size
    err, err_n, notes = np.full(n, np.nan), np.full(n, np.nan), []
    for j, h in enumerate(holds):
        keep = np.arange(n) != j
        try:
            _refuse_if_hopeless(_subset(rows, keep), degree)
            ei, coeffs, *_ = _fit_segments(_subset(rows, keep), degree)
        except ForceCalibrationError as exc:
            notes.append(f"hold {j}: no leave-one-out estimate ({exc})")
            continue
        model = ForceModel(lengths, ei, coeffs, unit)
        est = ForceEstimator(model, h.s_m, contact_s_m=h.contact_s_m, quadrature=quadrature, **estimator_options)
        res = est.process(rows.kappa[j][None], np.asarray(h.xy_m, dtype=np.float64)[None], rows.p[j])
        err[j] = np.hypot(*(res.force_n[0] - rows.force[j]))
        t = res.tangent[0]
        err_n[j] = abs(res.normal_n[0] - (t[0] * rows.force[j, 1] - t[1] * rows.force[j, 0]))
    return err, err_n, notes


def fit_force_model(
    holds,
    *,
    segment_lengths_m,
    degree: int = 1,
    actuation_unit: str = "",
    quadrature: str = "cubic",
    axial_prior_sigma_n: float = DEFAULT_AXIAL_PRIOR_SIGMA_N,
    axial_friction: float | None = None,
    curvature_noise_per_m=DEFAULT_CURVATURE_NOISE_PER_M,
    separation_warn: float = DEFAULT_SEPARATION_WARN,
) -> tuple[ForceModel, ForceFitReport]:
    """Fit each segment's stiffness and free curvature from labelled holds.

    Pure, any thread.

    Parameters
    ----------
    holds : sequence of ForceHold
    segment_lengths_m : array_like, shape (S,)
        Tap k to tap k+1, m.
    degree : {1, 2}
        Degree of the free curvature in the actuation (no constant term).
        1 (default) needs the fewest holds; use 2 when the residual shows a
        curved pressure response and holds cover 2+ nonzero actuation levels.
    actuation_unit : str
        Label stored in the model.
    quadrature : {"cubic", "linear"}
        Shape interpolation for the moment arms (as in the estimator).
    axial_prior_sigma_n, axial_friction, curvature_noise_per_m
        Estimator options for the leave-one-out estimates (pass those the
        live path will use, so the held-out error is the one to expect).
    separation_warn : float
        Warn for a segment whose ``separation`` is below this.

    Returns
    -------
    model : ForceModel
    report : ForceFitReport

    Raises
    ------
    ForceCalibrationError
        No loaded holds, one actuation level only, fewer holds than unknowns,
        a segment without moment or with a non-positive fitted stiffness, a bad hold.
    """
    if degree not in (1, 2):
        raise ValueError(f"degree must be 1 or 2, got {degree!r}")
    holds = list(holds)
    if not holds:
        raise ForceCalibrationError("no holds given")
    lengths = np.asarray(segment_lengths_m, dtype=np.float64).reshape(-1)
    rows = _prepare(holds, lengths, quadrature)
    _refuse_if_hopeless(rows, degree)
    ei, coeffs, rms, sep, cond = _fit_segments(rows, degree)
    model = ForceModel(lengths, ei, coeffs, actuation_unit)
    warnings = [
        f"segment {k}: cannot separate stiffness from actuation (separation {sep[k]:.3g} < {separation_warn:g}; "
        "vary force and actuation independently)"
        for k in np.flatnonzero(sep < separation_warn)
    ]
    options = {"axial_prior_sigma_n": axial_prior_sigma_n, "axial_friction": axial_friction,
               "curvature_noise_per_m": curvature_noise_per_m}
    err, err_n, notes = _leave_one_out(holds, rows, lengths, degree, actuation_unit, quadrature, options)
    warnings.extend(notes)
    mags = np.hypot(rows.force[:, 0], rows.force[:, 1])
    span = float(mags.max() - mags.min())
    finite = err[np.isfinite(err)]
    loo_rms = float(np.sqrt(np.mean(finite**2))) if finite.size else float("nan")
    report = ForceFitReport(
        ei_n_m2=ei.copy(), free_curvature_coeffs=coeffs.copy(), residual_rms_per_m=rms, separation=sep,
        condition=cond, loo_force_error_n=err, loo_normal_error_n=err_n, loo_rms_n=loo_rms,
        loo_max_n=float(finite.max()) if finite.size else float("nan"), force_range_n=span,
        loo_rms_percent=100.0 * loo_rms / span if span > 0 else float("nan"), warnings=tuple(warnings),
    )
    return model, report

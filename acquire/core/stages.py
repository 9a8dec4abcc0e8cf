"""The optional stages of the numeric chain: the strip's memory and the force on the finger.

Both follow the calibration in force (a calibration file may carry a
``memory`` and a ``force`` section); both are used by
:class:`acquire.core.pipeline.Pipeline` only, so live, record, replay,
publish and process compute them the same way.

:class:`MemoryStage`
    filtered resistance -> the static (memory-free) relative change the
    calibration's monotone law expects: x = R / r0 - 1 goes through the
    calibration's :class:`~acquire.core.memory.StripMemory` compensator
    (causal, with state, chunk-invariant); the pipeline evaluates the law on
    it directly (:meth:`~acquire.core.calibration.Calibration.evaluate_relative`)
    and reports it in ohm as ``r0 (1 + x)``.
:class:`ForceStage`
    curvature and actuation -> the force at the sensor's far end
    (:class:`~acquire.core.force_direct.CurvatureForce`), and the actuation input
    in the rig's unit whenever the rig has an ``[actuation]`` channel.

Thread rules: an instance belongs to one Pipeline and runs on its
processing thread (the Pipeline's lock serialises it).
"""
from __future__ import annotations

import numpy as np

__all__ = ["MemoryStage", "ForceStage"]


class MemoryStage:
    """Strip memory compensation that follows the calibration in force."""

    def __init__(self, *, rate_hz: float):
        self.rate_hz = float(rate_hz)
        self._key = None
        self._compensator = None

    def reset(self) -> None:
        """Forget the memory state (a restart of the stream)."""
        if self._compensator is not None:
            self._compensator.reset()

    def process(self, filtered_ohm: np.ndarray, calibration) -> np.ndarray | None:
        """The static relative change ``R_static / r0 - 1`` (N, S), dimensionless, of the filtered
        resistance (N, S) ohm; None when the calibration has no memory. New array, owned by the caller."""
        model = None if calibration is None else calibration.memory_model
        if model is None:
            self._key = self._compensator = None
            return None
        if self._key is not calibration.memory:  # a new memory model; a tare keeps the same one
            self._key = calibration.memory
            self._compensator = model.compensator(rate_hz=self.rate_hz)
        x = filtered_ohm / calibration.r0_ohm
        x -= 1.0  # in place: the same numbers as R / r0 - 1, one array fewer
        return self._compensator.process(x)


class ForceStage:
    """Actuation from its channel and the force from the shape, following the calibration's force model."""

    def __init__(self, *, rig, reconstructor, with_sigma: bool = True):
        self.actuation = getattr(rig, "actuation", None)
        self.reconstructor = reconstructor
        self.with_sigma = bool(with_sigma)
        self._key = None
        self._estimator = None

    def actuation_value(self, codes: np.ndarray) -> np.ndarray | None:
        """(N,) actuation in the rig's unit, or None without an ``[actuation]`` channel (new array)."""
        return None if self.actuation is None else self.actuation.value(codes)

    def process(self, calibration, curvature_per_m, actuation) -> tuple[np.ndarray, np.ndarray] | None:
        """(force_n (N, 2) float32, sigma_n (N, 2) float32 or None: normal and axial 1-sigma), or None.

        From the curvature (N, S) 1/m and the actuation (N,) alone, with the
        reconstruction's heading between the taps (no shape points needed);
        sigma is None for a stage made ``with_sigma=False`` (a view's).
        """
        model = None if calibration is None else calibration.force_model
        if model is None or actuation is None:
            return None
        if self._key is not calibration.force:
            from acquire.core.force_direct import CurvatureForce

            self._key = calibration.force
            options = _estimator_options(calibration.force.get("estimator"))
            self._estimator = CurvatureForce(model, self.reconstructor, **options)
        force, sigma = self._estimator.force_and_sigma(curvature_per_m, actuation, with_sigma=self.with_sigma)
        return force.astype(np.float32), None if sigma is None else sigma.astype(np.float32)


#: estimator options a calibration's force section may carry (fitted with it), and their bounds
_ESTIMATOR_BOUNDS = {"axial_prior_sigma_n": (1e-6, 1e4), "curvature_noise_per_m": (1e-6, 1e3),
                     "axial_friction": (1e-3, 10.0)}


def _estimator_options(d) -> dict:
    """The stored estimator options that are known and within bounds (others are ignored)."""
    out = {}
    for key, (lo, hi) in _ESTIMATOR_BOUNDS.items():
        value = (d or {}).get(key)
        if isinstance(value, (int, float)) and not isinstance(value, bool) and lo <= value <= hi:
            out[key] = float(value)
    return out

"""The numeric chain, frames to shape: codes -> resistance -> filtered -> curvature -> points.

One :class:`Pipeline` serves the live path (blocks of a few frames from the
ring) and offline processing (:func:`process_arrays`, :func:`iter_processed`);
its output does not depend on how the stream is cut into blocks.

Order: readout (stateless) -> wiring checks -> filters on resistance (state)
-> calibration (stateless) -> reconstruction (stateless). Filters act on
resistance, before calibration, so a calibration can be swapped or re-tared
without disturbing the filter state.

Faults: with ``mask_faults`` (default) a segment reading the wiring checks call
physically meaningless (taps out of order, tap 0 at full scale, a saturated
tap; see :attr:`acquire.core.readout.ChainCheck.unusable`) goes into the filters as
NaN, so it does not drag the filtered value; the spike filter bridges a short
fault, a longer one gives NaN until the reading is back. ``chain_ok`` reports
every frame with any failed check, out-of-range resistance included.
"""
from __future__ import annotations

import math
import threading
from dataclasses import dataclass
from typing import Iterator

import numpy as np

from acquire.core.calibration import Calibration
from acquire.core.stages import ForceStage, MemoryStage
from acquire.errors import UserError
from acquire.core.filters import FilterChain, _nanmedian_last_axis, filtfilt_zero_phase
from acquire.link.frames import FrameBlock
from acquire.core.readout import ChainCheck, make_readout
from acquire.core.reconstruct import Reconstructor
from acquire.rig import Rig

__all__ = [
    "tare_calibration", "shape_spacing_m", "SHAPE_TOLERANCE_M", "DENSE_SPACING_M","Processed", "Pipeline", "process_arrays", "iter_processed"]


@dataclass
class Processed:
    """Result of one block of N frames (arrays new, owned by the receiver).

    Attributes
    ----------
    resistance_ohm : ndarray of float64, shape (N, S)
        As read, ohm (NaN where unmeasurable).
    filtered_ohm : ndarray of float64, shape (N, S)
        After the spike filter and low-pass, ohm.
    curvature_per_m : ndarray of float32, shape (N, S), or None
        Mean curvature of each segment, 1/m; None without a calibration.
    xy_m : ndarray of float32, shape (N, P, 2), or None
        Shape points in the base frame, m, at :attr:`Pipeline.s_m`.
    chain_ok : ndarray of bool, shape (N,)
        Every wiring check passed.
    outside_calibration : ndarray of bool, shape (N, S), or None
        Curvature extrapolated beyond the calibrated range.
    chain : ChainCheck
        The individual wiring flags.
    static_ohm : ndarray of float64, shape (N, S), or None
        The filtered resistance with the strip's creep and hysteresis taken
        out (the calibration's memory model), ohm; None for a static calibration.
    actuation : ndarray of float64, shape (N,), or None
        The actuation input in the rig's unit (its ``[actuation]`` channel).
    force_n : ndarray of float32, shape (N, 2), or None
        Force at the sensor's far end in the base frame, N (calibration with a force model).
    force_sigma_n : ndarray of float32, shape (N, 2), or None
        1-sigma of the force's normal and axial components, N.
    """

    resistance_ohm: np.ndarray
    filtered_ohm: np.ndarray
    curvature_per_m: np.ndarray | None
    xy_m: np.ndarray | None
    chain_ok: np.ndarray
    outside_calibration: np.ndarray | None
    chain: ChainCheck
    static_ohm: np.ndarray | None = None
    actuation: np.ndarray | None = None
    force_n: np.ndarray | None = None
    force_sigma_n: np.ndarray | None = None

    def __len__(self) -> int:
        return int(self.resistance_ohm.shape[0])

    @staticmethod
    def concat(parts: list["Processed"]) -> "Processed":
        """Join consecutive results (all with or all without calibration)."""
        def cat(name):
            vals = [getattr(p, name) for p in parts]
            return None if any(v is None for v in vals) else np.concatenate(vals)

        chain = ChainCheck(**{
            f: np.concatenate([getattr(p.chain, f) for p in parts])
            for f in ("order_violated", "top_at_full_scale", "out_of_range", "saturated")
        })
        return Processed(
            resistance_ohm=cat("resistance_ohm"),
            filtered_ohm=cat("filtered_ohm"),
            curvature_per_m=cat("curvature_per_m"),
            xy_m=cat("xy_m"),
            chain_ok=cat("chain_ok"),
            outside_calibration=cat("outside_calibration"),
            chain=chain,
            static_ohm=cat("static_ohm"),
            actuation=cat("actuation"),
            force_n=cat("force_n"),
            force_sigma_n=cat("force_sigma_n"),
        )


class Pipeline:
    """Frames to shape for one rig.

    Parameters
    ----------
    rig : Rig
    calibration : Calibration or None
        Without one, curvature and shape are None.
    rate_hz : float
        Device sample rate, Hz (for the low-pass).
    adc_bits : int
        From the device's hello.
    spacing_m : float
        Largest spacing of shape points, m.
    method : {"smooth", "arcs"}
        See :mod:`acquire.core.reconstruct`.
    mask_faults : bool
        See the module docstring.
    with_shape : bool
        Compute the shape points (False: ``xy_m`` is None; a view draws only the frames it shows).
    with_force_sigma : bool
        With a force model, also the force's uncertainties (False: ``force_sigma_n`` is None,
        the force in about half the work; a view that draws the force alone).

    Threads: :meth:`process` and :meth:`reset` run on the processing thread
    (they are serialised by a lock, so another thread may call :meth:`reset`
    too). :meth:`set_calibration` and :meth:`tare_from` may be called from any
    thread (the GUI): the new calibration takes effect at the next block.

    Raises
    ------
    UserError
        The calibration does not fit the rig, or the rig's filters do not fit
        the sample rate.
    """

    def __init__(
        self,
        *,
        rig: Rig,
        calibration: Calibration | None = None,
        rate_hz: float,
        adc_bits: int,
        spacing_m: float = 0.001,
        method: str = "smooth",
        mask_faults: bool = True,
        with_shape: bool = True,
        with_force_sigma: bool = True,
    ):
        self.rig = rig
        self.with_shape = bool(with_shape)
        self.rate_hz = float(rate_hz)
        self.adc_bits = int(adc_bits)
        self.mask_faults = bool(mask_faults)
        self.readout = make_readout(rig, adc_bits=adc_bits)
        # the actuation (if any) is filtered as one more column, so the force sees it with the curvature's delay
        n_act = int(getattr(rig, "actuation", None) is not None)
        self.filters = FilterChain.from_rig(rig, rate_hz=rate_hz, n_signals=rig.n_segments + n_act)
        self.reconstructor = Reconstructor.from_rig(rig, spacing_m=spacing_m, method=method)
        self.memory = MemoryStage(rate_hz=rate_hz)
        self.force = ForceStage(rig=rig, reconstructor=self.reconstructor, with_sigma=with_force_sigma)
        self._cal_lock = threading.Lock()
        self._run_lock = threading.Lock()
        self.calibration_notes: list[str] = []
        self._calibration: Calibration | None = None
        if calibration is not None:
            self.set_calibration(calibration)

    @property
    def n_segments(self) -> int:
        return self.rig.n_segments

    @property
    def s_m(self) -> np.ndarray:
        """(P,) arc length of each shape point, m (read-only)."""
        return self.reconstructor.s_m

    @property
    def calibration(self) -> Calibration | None:
        with self._cal_lock:
            return self._calibration

    def set_calibration(self, calibration: Calibration | None) -> None:
        """Use another calibration (or none) from the next block on; any thread.

        Raises
        ------
        UserError
            It does not fit the rig (segment count or readout kind).
        """
        notes = [] if calibration is None else calibration.check_rig(self.rig)
        with self._cal_lock:
            self._calibration = calibration
            self.calibration_notes = notes

    def tare_from(self, resistance_ohm: np.ndarray) -> Calibration:
        """Re-zero the calibration at the median of frames held flat; any thread.

        Parameters
        ----------
        resistance_ohm : array_like, shape (n, S)
            Flat frames, ohm (e.g. ``filtered_ohm`` of the last second).

        Returns
        -------
        Calibration
            The tared calibration, now in use.

        Raises
        ------
        UserError
            No calibration loaded, or a segment has no valid frame.
        """
        tared = tare_calibration(self.calibration, resistance_ohm)
        self.set_calibration(tared)
        return tared

    def reset(self) -> None:
        """Forget the filter state (after a reconnect or a jump in the stream)."""
        with self._run_lock:
            self.filters.reset()
            self.memory.reset()

    def process(self, block: FrameBlock) -> Processed:
        """Process the next block of the stream (processing thread).

        The filters restart at the block's :attr:`~acquire.link.frames.FrameBlock.restarts`
        (a reconnect or a device reboot): this is the one place that reacts to
        them, so every consumer of a stream, live or offline, agrees.
        """
        return self.process_codes(block.codes, restarts=block.restarts)

    def process_codes(self, codes: np.ndarray, *, restarts=()) -> Processed:
        """As :meth:`process`, from codes of shape (N, C) and restart offsets in them."""
        with self._run_lock:
            cal = self.calibration  # one calibration per block
            resistance, check, to_filter = self._read(codes)
            filtered, static_x = self._stateful(to_filter, restarts, cal)
            return self._finish(np.asarray(codes), resistance, filtered, static_x, check, cal)

    def _stateful(self, x: np.ndarray, restarts, cal) -> tuple[np.ndarray, np.ndarray | None]:
        """Filters, then the strip's memory: both restart at ``restarts`` (offsets in ``x``).

        Returns the filtered signals and the memory stage's static relative change (or None).
        """
        cuts = sorted({int(r) for r in restarts if 0 < int(r) < x.shape[0]})
        if any(int(r) == 0 for r in restarts):
            self.filters.reset()
            self.memory.reset()
        if not cuts:
            filtered = self.filters.process(x)
            return filtered, self.memory.process(filtered[:, :self.n_segments], cal)
        f_parts, s_parts, start = [], [], 0
        for stop in [*cuts, x.shape[0]]:
            f = self.filters.process(x[start:stop])
            f_parts.append(f)
            s_parts.append(self.memory.process(f[:, :self.n_segments], cal))
            if stop < x.shape[0]:
                self.filters.reset()
                self.memory.reset()
            start = stop
        static = None if s_parts[0] is None else np.concatenate(s_parts)
        return np.concatenate(f_parts), static

    def _read(self, codes: np.ndarray):
        codes = np.asarray(codes)
        if codes.ndim != 2 or codes.shape[1] != self.rig.n_channels:
            raise ValueError(f"expected codes of shape (N, {self.rig.n_channels}), got {codes.shape}")
        resistance, check = self.readout.read(codes)
        to_filter = np.where(check.unusable, np.nan, resistance) if self.mask_faults else resistance
        if self.force.actuation is not None:  # filtered with the resistances (see __init__)
            to_filter = np.column_stack([to_filter, self.force.actuation_value(codes)])
        return resistance, check, to_filter

    def _finish(self, codes, resistance, filtered, static_x, check, cal) -> Processed:
        """The stateless rest of a block; ``static_x``: the memory stage's static relative change, or None."""
        actuation = self.force.actuation_value(codes)
        act_filtered = filtered[:, self.n_segments] if actuation is not None else None
        filtered = np.ascontiguousarray(filtered[:, :self.n_segments])
        curvature = xy = outside = force = static = None
        if cal is not None and static_x is not None:  # the law on the compensated x itself, no round trip
            k, outside = cal.evaluate_relative(static_x)
            static = cal.r0_ohm * (1.0 + static_x)
        elif cal is not None:
            k, outside = cal.evaluate(filtered)
        if cal is not None:
            curvature = k.astype(np.float32)
            xy = self.reconstructor.shape_xy(k, dtype=np.float32) if self.with_shape else None
            force = self.force.process(cal, k, act_filtered)
        return Processed(
            resistance_ohm=resistance,
            filtered_ohm=filtered,
            curvature_per_m=curvature,
            xy_m=xy,
            chain_ok=check.ok,
            outside_calibration=outside,
            chain=check,
            static_ohm=static,
            actuation=actuation,
            force_n=None if force is None else force[0],
            force_sigma_n=None if force is None else force[1],
        )


#: shape points written to files may be this far (m) from the dense reconstruction, linearly interpolated
SHAPE_TOLERANCE_M = 5e-5
#: the densest spacing of shape points, m (also the live display's)
DENSE_SPACING_M = 0.001
#: the smooth reconstruction's curvature may exceed the largest segment mean by this factor between taps
#: (a C1 spline through means; 1.5 covers the demo grasp with room, checked in the tests)
_SPLINE_OVERSHOOT = 1.5


def shape_spacing_m(calibration: Calibration | None, *, tolerance_m: float = SHAPE_TOLERANCE_M) -> float:
    """Spacing of stored shape points so that linear interpolation stays within ``tolerance_m`` of the shape.

    A chord of length h on a curve of curvature k is at most k h^2 / 8 from the
    arc (the sagitta of a circular arc, standard geometry), so
    h = sqrt(8 tol / k_max) with k_max the largest curvature the calibration
    covers (its curvature range, times a margin for the spline between taps).
    Never denser than :data:`DENSE_SPACING_M`; any thread.
    """
    if calibration is None:
        return DENSE_SPACING_M
    k = np.abs(np.r_[calibration.curvature_min_per_m, calibration.curvature_max_per_m])
    k = k[np.isfinite(k)]
    k_max = float(k.max()) * _SPLINE_OVERSHOOT if k.size else 0.0
    if k_max <= 0:
        return 0.05  # a straight calibration: points every 5 cm are exact; taps are always points
    return max(DENSE_SPACING_M, math.sqrt(8.0 * tolerance_m / k_max))


def tare_calibration(calibration: Calibration | None, resistance_ohm: np.ndarray) -> Calibration:
    """The one definition of tare: ``calibration`` re-zeroed at the median of frames held flat (any thread).

    Parameters
    ----------
    calibration : Calibration or None
    resistance_ohm : array_like, shape (n, S)
        Filtered resistances of frames with the sensor flat, ohm (the last
        second live; the whole flat recording offline).

    Raises
    ------
    UserError
        No calibration, no frames, or a segment without a valid frame.
    """
    if calibration is None:
        raise UserError("cannot tare: no calibration loaded")
    r = np.asarray(resistance_ohm, dtype=np.float64)
    n_seg = calibration.n_segments
    if r.ndim != 2 or r.shape[1] != n_seg or r.shape[0] == 0:
        raise UserError(f"cannot tare: need frames of {n_seg} segments, got shape {r.shape}")
    med = _nanmedian_last_axis(r.T)  # NaN for a segment without a valid frame; tared() refuses it
    return calibration.tared(med)


def iter_processed(
    codes,
    *,
    rig: Rig,
    calibration: Calibration | None,
    rate_hz: float,
    adc_bits: int,
    spacing_m: float = 0.001,
    method: str = "smooth",
    zero_phase: bool = False,
    chunk_frames: int = 65536,
    mask_faults: bool = True,
    restarts=(),
) -> Iterator[tuple[int, Processed]]:
    """Process a whole recording chunk by chunk (offline; any thread).

    Parameters
    ----------
    codes : array_like or h5py.Dataset, shape (N, C)
        Sliced ``chunk_frames`` rows at a time, so a dataset is never read whole.
    zero_phase : bool
        Filter with :func:`acquire.core.filters.filtfilt_zero_phase` (no delay;
        needs all resistances in memory, 8*S bytes per frame) instead of the
        causal live filters.
    restarts : sequence of int
        Frame indices where the stream starts afresh (a recording's reconnect
        and reboot events): the filters restart there, as they did live.
    Other parameters as for :class:`Pipeline`.

    Yields
    ------
    (start, Processed)
        Frame index of the chunk's first frame, and its results.
    """
    pipe = Pipeline(
        rig=rig, calibration=calibration, rate_hz=rate_hz, adc_bits=adc_bits,
        spacing_m=spacing_m, method=method, mask_faults=mask_faults,
    )
    n = int(codes.shape[0])
    step = max(1, int(chunk_frames))
    if not zero_phase:
        marks = np.asarray(sorted(set(int(r) for r in restarts)), dtype=np.int64)
        for start in range(0, n, step):
            chunk = np.asarray(codes[start:start + step])
            inside = marks[(marks >= start) & (marks < start + chunk.shape[0])] - start
            yield start, pipe.process_codes(chunk, restarts=inside)
        return
    # zero phase: read everything to resistance first, filter forwards and backwards, then finish by chunk
    reads = [pipe._read(np.asarray(codes[start:start + step])) for start in range(0, n, step)]
    if not reads:
        return
    to_filter = np.concatenate([r[2] for r in reads])
    filtered = filtfilt_zero_phase(
        to_filter, rate_hz=rate_hz, cutoff_hz=rig.lowpass_hz, order=rig.lowpass_order,
        spike_window=rig.spike_window,
    )
    cal = pipe.calibration
    for i, (resistance, check, _) in enumerate(reads):
        start = i * step
        f = filtered[start:start + resistance.shape[0]]
        chunk = np.asarray(codes[start:start + resistance.shape[0]])
        yield start, pipe._finish(chunk, resistance, f, pipe.memory.process(f[:, :pipe.n_segments], cal), check, cal)


def process_arrays(codes, **options) -> Processed:
    """All of :func:`iter_processed` joined into one :class:`Processed`.

    Keyword options as for :func:`iter_processed` (``rig``, ``calibration``,
    ``rate_hz`` and ``adc_bits`` required). Mind the memory of ``xy_m`` (8 * P bytes per frame); for long recordings
    write chunk by chunk from :func:`iter_processed` instead.
    """
    parts = [p for _, p in iter_processed(codes, **options)]
    if not parts:  # nothing to process: the empty result of the same pipeline
        kept = ("rig", "calibration", "rate_hz", "adc_bits", "spacing_m", "method", "mask_faults")
        pipe = Pipeline(**{k: options[k] for k in kept if k in options})
        return pipe.process_codes(np.zeros((0, options["rig"].n_channels), dtype=np.uint16))
    return Processed.concat(parts)

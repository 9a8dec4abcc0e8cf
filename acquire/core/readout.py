"""Readout electrics: ADC codes to segment resistances, and the wiring checks that go with them.

A readout turns the codes of one frame block into the resistance of each sensor
segment (tap k to tap k+1) and says which frames and segments cannot be
trusted. Every kind of readout is a subclass of :class:`Readout`; the rig file's
``[readout] kind`` picks one through :func:`make_readout`.

The default kind, ``divider`` (the readout formula in the README's rig file section): the excitation voltage,
which is also the ADC reference, drives ``r_ref_ohm`` into tap 0; the strip runs
to tap S, which is ground; channel ``rig.tap_channels[k]`` measures tap k. With
``v_k = code_k / 2**adc_bits`` and ``v_S = 0``::

    R_k = r_ref_ohm * (v_k - v_{k+1}) / (1 - v_0)

A healthy chain reads ``v_0 > v_1 > ... > v_{S-1} > 0``. Channels that measure
something else (``pressure`` ...) are ignored here.

All functions are vectorised over frames, keep no state, and may run on any
thread. Returned arrays are new and owned by the caller.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from acquire.errors import UserError
from acquire.rig import Rig

__all__ = ["ChainCheck", "Readout", "DividerReadout", "make_readout", "READOUTS"]


@dataclass
class ChainCheck:
    """Wiring checks of N frames of an S-segment chain (all arrays owned by the caller).

    Attributes
    ----------
    order_violated : ndarray of bool, shape (N, S)
        Segment k's taps are out of order: ``v_k <= v_{k+1}`` (for the last
        segment: ``v_{S-1} <= 0``). A swapped or open tap, or a short.
    top_at_full_scale : ndarray of bool, shape (N,)
        Tap 0 reads at or near full scale: almost no current flows (open chain,
        ground lead off, or tap 0 shorted to the excitation).
    out_of_range : ndarray of bool, shape (N, S)
        Segment resistance outside ``rig.segment_ohm_range`` (or not a number).
    saturated : ndarray of bool, shape (N, S)
        Tap k's code is 0, at full scale ``2**adc_bits - 1``, or beyond it.
    """

    order_violated: np.ndarray
    top_at_full_scale: np.ndarray
    out_of_range: np.ndarray
    saturated: np.ndarray

    @property
    def segment_ok(self) -> np.ndarray:
        """(N, S) bool: no check failed for this segment (a frame-wide failure counts)."""
        bad = self.order_violated | self.out_of_range | self.saturated
        bad |= self.top_at_full_scale[:, None]
        return ~bad

    @property
    def unusable(self) -> np.ndarray:
        """(N, S) bool: the reading is physically meaningless, not merely unusual.

        Tap order violated, tap 0 at full scale or a saturated tap. Out-of-range
        resistances are *not* included: a hard bend may leave the declared
        healthy range and still be a true reading.
        """
        return self.order_violated | self.saturated | self.top_at_full_scale[:, None]

    @property
    def ok(self) -> np.ndarray:
        """(N,) bool: every check passed for every segment of the frame."""
        return self.segment_ok.all(axis=1)


class Readout:
    """Base of all readout kinds.

    Subclasses set ``kind`` and implement :meth:`resistance_ohm` and
    :meth:`chain_check`. Both take codes of shape (N, C) (C = the rig's channel
    count, any unsigned integer dtype) and return new arrays.
    """

    kind: str = ""

    def __init__(self, *, tap_channels: np.ndarray, adc_bits: int, segment_ohm_range: tuple[float, float]):
        if not 1 <= int(adc_bits) <= 16:
            raise UserError(f"adc_bits must be 1..16, got {adc_bits!r}")
        self.tap_channels = np.asarray(tap_channels, dtype=np.int64).copy()
        self.adc_bits = int(adc_bits)
        self.full_scale_code = (1 << self.adc_bits) - 1
        self.segment_ohm_range = (float(segment_ohm_range[0]), float(segment_ohm_range[1]))

    @property
    def n_segments(self) -> int:
        return int(self.tap_channels.shape[0])

    def tap_codes(self, codes: np.ndarray) -> np.ndarray:
        """(N, S) int64 codes of taps 0 .. S-1, picked from the channels."""
        codes = np.asarray(codes)
        if codes.ndim != 2:
            raise ValueError(f"codes must be 2-D (frames, channels), got shape {codes.shape}")
        return codes[:, self.tap_channels].astype(np.int64)

    def tap_fraction(self, codes: np.ndarray) -> np.ndarray:
        """(N, S) float64 tap voltages as fractions of the ADC reference, ``code / 2**adc_bits``."""
        return self.tap_codes(codes) * (1.0 / (1 << self.adc_bits))

    @classmethod
    def from_rig(cls, rig: Rig, *, adc_bits: int) -> "Readout":  # pragma: no cover - abstract
        """Build from the rig file's ``[readout]`` table and the device's ADC resolution."""
        raise NotImplementedError

    def resistance_ohm(self, codes: np.ndarray) -> np.ndarray:  # pragma: no cover - abstract
        raise NotImplementedError

    def chain_check(self, codes: np.ndarray) -> ChainCheck:  # pragma: no cover - abstract
        raise NotImplementedError

    def read(self, codes: np.ndarray) -> tuple[np.ndarray, ChainCheck]:
        """Both :meth:`resistance_ohm` and :meth:`chain_check` (subclasses may share work)."""
        return self.resistance_ohm(codes), self.chain_check(codes)

    def _saturated(self, tap: np.ndarray) -> np.ndarray:
        return (tap <= 0) | (tap >= self.full_scale_code)

    def _out_of_range(self, r: np.ndarray) -> np.ndarray:
        lo, hi = self.segment_ohm_range
        with np.errstate(invalid="ignore"):
            return ~((r >= lo) & (r <= hi))  # NaN counts as out of range


class DividerReadout(Readout):
    """Ratiometric divider readout (``kind = "divider"``), see the module docstring.

    Parameters
    ----------
    tap_channels : ndarray of int, shape (S,)
        Channel index measuring tap k.
    adc_bits : int
        ADC resolution from the device's hello.
    r_ref_ohm : float
        Reference resistor between the excitation and tap 0, ohm.
    segment_ohm_range : (float, float)
        A healthy segment reads inside this, ohm.
    top_margin : float
        Tap 0 counts as "at full scale" when ``1 - v_0 <= top_margin``
        (default 0.005: the chain would be more than 199 times ``r_ref``).
    """

    kind = "divider"

    def __init__(
        self,
        *,
        tap_channels: np.ndarray,
        adc_bits: int,
        r_ref_ohm: float,
        segment_ohm_range: tuple[float, float] = (100.0, 1.0e6),
        top_margin: float = 0.005,
    ):
        super().__init__(tap_channels=tap_channels, adc_bits=adc_bits, segment_ohm_range=segment_ohm_range)
        self.r_ref_ohm = float(r_ref_ohm)
        self.top_margin = float(top_margin)

    @classmethod
    def from_rig(cls, rig: Rig, *, adc_bits: int) -> "DividerReadout":
        return cls(
            tap_channels=rig.tap_channels,
            adc_bits=adc_bits,
            r_ref_ohm=rig.r_ref_ohm,
            segment_ohm_range=rig.segment_ohm_range,
        )

    def _drops(self, v: np.ndarray) -> np.ndarray:
        # v_k - v_{k+1} with v_S = 0
        drops = np.empty_like(v)
        drops[:, :-1] = v[:, :-1] - v[:, 1:]
        drops[:, -1] = v[:, -1]
        return drops

    def resistance_ohm(self, codes: np.ndarray) -> np.ndarray:
        """Segment resistances of N frames.

        Parameters
        ----------
        codes : ndarray of uint16, shape (N, C)

        Returns
        -------
        ndarray of float64, shape (N, S)
            Ohm. NaN for every segment of a frame whose tap 0 code is at or
            beyond full scale (the current ``1 - v_0`` is then below one code
            and cannot be measured) or whose tap codes exceed full scale.
            Out-of-order taps give zero or negative values, as measured;
            :meth:`chain_check` flags them.
        """
        return self.read(codes)[0]

    def chain_check(self, codes: np.ndarray) -> ChainCheck:
        """Per-frame and per-segment wiring flags of N frames (see :class:`ChainCheck`)."""
        return self.read(codes)[1]

    def read(self, codes: np.ndarray) -> tuple[np.ndarray, ChainCheck]:
        """Resistances (as :meth:`resistance_ohm`) and wiring flags, computed once."""
        tap = self.tap_codes(codes)
        v = tap * (1.0 / (1 << self.adc_bits))
        drops = self._drops(v)
        current = 1.0 - v[:, 0]
        measurable = (tap[:, 0] < self.full_scale_code) & (tap <= self.full_scale_code).all(axis=1)
        scale = np.full(current.shape, np.nan)  # divide only where measurable: no warning, no inf
        np.divide(self.r_ref_ohm, current, out=scale, where=measurable)
        r = drops * scale[:, None]
        check = ChainCheck(
            order_violated=drops <= 0.0,
            top_at_full_scale=current <= self.top_margin,
            out_of_range=self._out_of_range(r),
            saturated=self._saturated(tap),
        )
        return r, check


READOUTS: dict[str, type[Readout]] = {"divider": DividerReadout}


def make_readout(rig: Rig, *, adc_bits: int) -> Readout:
    """The readout the rig file's ``[readout] kind`` names.

    Raises
    ------
    UserError
        The kind is not implemented here.
    """
    cls = READOUTS.get(rig.readout_kind)
    if cls is None:
        raise UserError(
            f"{rig.source}: [readout] kind {rig.readout_kind!r} has no readout "
            f"(known: {', '.join(sorted(READOUTS))})"
        )
    return cls.from_rig(rig, adc_bits=adc_bits)

"""The virtual finger's built-in calibration, so that it shows its shape with no options.

The calibration (``builtin_calibration.json`` beside this module) was fitted by
:func:`make_builtin_calibration` from jig holds of the virtual finger itself:
the default finger (seed :data:`BUILTIN_SEED`, 12-bit ADC, the default real
strip: creep, hysteresis, drift) pressed onto jigs of known curvature one
after another in frame order, read through the built-in rig's divider, the
steady part of each hold fitted with
:func:`acquire.core.calibration.fit_calibration` like any lab calibration.
Regenerate it (after a change to the finger's electrics) with::

    .venv/bin/python -m acquire.virtual.builtin --force

Threads: :func:`builtin_calibration` reads one small file; any thread.
"""
from __future__ import annotations

import argparse
import json
import sys
from functools import lru_cache
from pathlib import Path

import numpy as np

from acquire.core.calibration import Calibration
from acquire.core.calibration_fit import Hold, fit_calibration
from acquire.core.holds import steady_part
from acquire.core.labels import parse_hold_label
from acquire.core.readout import DividerReadout
from acquire.rig import Rig, load_rig

__all__ = [
    "BUILTIN_SEED",
    "BUILTIN_SOURCE",
    "BUILTIN_CALIBRATION_PATH",
    "JIG_LABELS",
    "builtin_calibration",
    "is_builtin_rig",
    "make_builtin_calibration",
]

#: the seed of the finger the calibration belongs to: the default of every command
BUILTIN_SEED = 0
#: the calibration's ``source`` (shown where a calibration is named)
BUILTIN_SOURCE = "built-in calibration of the virtual finger"
BUILTIN_CALIBRATION_PATH = Path(__file__).resolve().parent / "builtin_calibration.json"
#: the jigs, both bend directions, to beyond the grasp scenario's range
JIG_LABELS = ("flat", "curvature=10/m", "radius=50mm", "radius=30mm", "radius=20mm", "radius=15mm",
              "curvature=-10/m", "radius=-50mm", "radius=-30mm", "radius=-20mm", "flat")
_FIRMWARE = "tapcurve-virtual"
_RATE_HZ = 1000.0
_HOLD_S = 24.0  # long enough for the default creep (tau about 4 s) to settle: 6 tau
_ADC_BITS = 12


def is_builtin_rig(rig: Rig) -> bool:
    """Whether ``rig`` describes the built-in demo finger electrically (lengths, channels, r_ref, kind).

    Comments, the name and the body outline may differ: they do not change what
    the codes mean.
    """
    ref = load_rig(None)
    return (
        rig.readout_kind == ref.readout_kind
        and rig.channels == ref.channels
        and rig.segment_lengths_m.shape == ref.segment_lengths_m.shape
        and bool(np.allclose(rig.segment_lengths_m, ref.segment_lengths_m, rtol=0, atol=1e-9))
        and abs(rig.r_ref_ohm - ref.r_ref_ohm) <= 1e-9 * ref.r_ref_ohm
    )


def _hello_matches(hello: dict | None) -> bool:
    if hello is None:
        return True
    # a real board wired like the demo is not the virtual finger; another seed is another sensor
    firmware = str(hello.get("firmware", ""))
    return (firmware.startswith(_FIRMWARE) and hello.get("serial") == f"VF-{BUILTIN_SEED:04X}"
            and int(hello.get("adc_bits", _ADC_BITS)) == _ADC_BITS)


@lru_cache(maxsize=1)
def _load() -> Calibration:
    return Calibration.from_json(BUILTIN_CALIBRATION_PATH.read_text(encoding="utf-8"), source=BUILTIN_SOURCE)


def builtin_calibration(rig: Rig, *, hello: dict | None = None) -> Calibration | None:
    """The virtual finger's calibration if ``rig`` (and ``hello``) are the built-in finger's, else None.

    Parameters
    ----------
    rig : Rig
        The rig in use; see :func:`is_builtin_rig`.
    hello : dict, optional
        The device's (or recording's) hello. When given, it must be the
        virtual finger's with seed :data:`BUILTIN_SEED` and a 12-bit ADC:
        another seed is another simulated sensor.

    Returns
    -------
    Calibration or None
        Shared and immutable; ``source`` is :data:`BUILTIN_SOURCE`.
    """
    if not is_builtin_rig(rig) or not _hello_matches(hello):
        return None
    return _load()


def _jig_hold(model, label: str, readout: DividerReadout, index: int, strip) -> Hold:
    """One hold, frames in order through the real strip's ``strip`` stream; the steady part is kept."""
    n = int(_HOLD_S * _RATE_HZ)
    t = index * _HOLD_S + np.arange(n) / _RATE_HZ
    held = model.with_hold(label)
    r = readout.resistance_ohm(held.codes(t, frame_index=np.arange(n) + index * n, strip=strip))
    keep = steady_part(t, r, float(t[0]), float(t[-1]))
    return Hold(reference_per_m=np.full(model.rig.n_segments, parse_hold_label(label)),
                resistance_ohm=r[keep], label=label)


def make_builtin_calibration(*, seed: int = BUILTIN_SEED) -> Calibration:
    """Fit the built-in calibration from simulated jig holds of the default finger's real strip (pure, seconds)."""
    from acquire.virtual.model import FingerModel

    rig = load_rig(None)
    model = FingerModel(rig=rig, seed=seed, adc_bits=_ADC_BITS)
    strip = model.real_strip().stream(rate_hz=_RATE_HZ)
    readout = DividerReadout.from_rig(rig, adc_bits=_ADC_BITS)
    holds = [_jig_hold(model, label, readout, i, strip) for i, label in enumerate(JIG_LABELS)]
    provenance = [{"path": f"virtual finger seed {seed} (real strip), simulated jig holds {', '.join(JIG_LABELS)}",
                   "sha256": "", "holds": list(JIG_LABELS)}]
    cal, _ = fit_calibration(holds, rig=rig, recordings=provenance, degree=3)
    return Calibration.from_json(cal.to_json(), source=BUILTIN_SOURCE)


def main(argv=None) -> int:
    """Write ``builtin_calibration.json`` (``--force`` replaces it); prints the fit report."""
    ap = argparse.ArgumentParser(prog="python -m acquire.virtual.builtin", description=main.__doc__)
    ap.add_argument("--out", type=Path, default=BUILTIN_CALIBRATION_PATH)
    ap.add_argument("--force", action="store_true", help="replace an existing file")
    args = ap.parse_args(argv)
    if args.out.exists() and not args.force:
        print(f"{args.out}: exists (add --force to replace it)", file=sys.stderr)
        return 2
    cal = make_builtin_calibration()
    args.out.write_text(cal.to_json(), encoding="utf-8")
    print(cal.report.summary())
    print(f"wrote {args.out} ({len(json.loads(cal.to_json())['model']['segments'])} segments)")
    return 0


if __name__ == "__main__":
    sys.exit(main())

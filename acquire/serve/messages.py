"""Frame messages of the shape stream: JSON text encoded with formats prepared once per calibration.

The format of each message is described in :mod:`acquire.serve.publish`.
Encoding is the publisher's hot path: every field of a healthy frame goes
through one ``%`` format prepared for the rig (numbers of channels,
segments and shape points); only a frame with a non-finite value (a broken
wire) takes the slow path through :mod:`json` to write ``null``.

Threads: a :class:`FrameEncoder` belongs to the publisher thread; returned
bytes are new.
"""
from __future__ import annotations

import json
import math

import numpy as np

__all__ = ["FrameEncoder"]


def _list_format(n: int, spec: str) -> str:
    return "[" + ",".join([spec] * n) + "]"


def _json_or_null(values, decimals: int | None):
    """Nested lists with non-finite numbers as None (slow path, frames with a fault only)."""
    if isinstance(values, list):
        return [_json_or_null(v, decimals) for v in values]
    if not math.isfinite(values):
        return None
    return round(values, decimals) if decimals is not None else float(f"{values:.6g}")


def _dumps(value) -> str:
    return json.dumps(value, separators=(",", ":"))


class FrameEncoder:
    """JSON text of frame messages (without the closing ``,"dropped":N}``).

    Parameters
    ----------
    n_channels : int
    n_segments : int, optional
        With ``s_m``: messages carry curvature and shape.
    s_m : array_like, shape (P,), optional
        Arc length of each shape point, m.
    actuation : acquire.rig.Actuation, optional
        The rig's ``[actuation]`` channel: messages carry ``actuation`` (in
        its unit) even without a calibration.
    """

    def __init__(self, *, n_channels: int, n_segments: int | None = None, s_m=None, actuation=None):
        self.fmt_codes = _list_format(int(n_channels), "%d")
        self.actuation = actuation
        self.shaped = s_m is not None
        if self.shaped:
            s = np.asarray(s_m, dtype=np.float64)
            self.fmt_curv = _list_format(int(n_segments), "%.6g")
            self.fmt_xy = "[" + ",".join(["[%.7f,%.7f]"] * int(s.shape[0])) + "]"
            self.s_m_part = ',"s_m":' + _dumps([round(float(v), 7) for v in s])

    def encode(self, block, processed, idx: np.ndarray, counters: str) -> list[bytes]:
        """Messages of frames ``idx`` of ``block``; ``processed`` from the pipeline (None: uncalibrated)."""
        seq = block.seq[idx].tolist()
        t = block.t_device_s[idx].tolist()
        codes = block.codes[idx].tolist()
        heads = ['{"seq":%d,"t_device_s":%.6f,"codes":' % (seq[j], t[j]) + self.fmt_codes % tuple(codes[j])
                 for j in range(idx.size)]
        if processed is not None and self.shaped:
            heads = [h + s for h, s in zip(heads, self._shapes(processed, idx))]
        tails = self._force_and_actuation(block, processed, idx)
        if tails is not None:
            heads = [h + s for h, s in zip(heads, tails)]
        return [(h + counters).encode() for h in heads]

    def _shapes(self, processed, idx: np.ndarray) -> list[str]:
        curv = processed.curvature_per_m[idx].astype(np.float64)
        xy = processed.xy_m[idx].astype(np.float64)
        finite = np.isfinite(curv).all(axis=1) & np.isfinite(xy).all(axis=(1, 2))
        ok = processed.chain_ok[idx].tolist()
        curv_l = curv.tolist()
        xy_flat = xy.reshape(idx.size, -1).tolist()
        out = []
        for j in range(idx.size):
            if finite[j]:
                row = xy_flat[j]
                shape = (
                    ',"curvature":' + self.fmt_curv % tuple(curv_l[j]) + self.s_m_part
                    + ',"xy":' + self.fmt_xy % tuple(row)
                    + ',"tip_xy":[%.7f,%.7f]' % (row[-2], row[-1])
                )
            else:  # a fault: JSON has no NaN, so null where a value is missing
                pts = _json_or_null(xy[j].tolist(), 7)
                shape = (
                    ',"curvature":' + _dumps(_json_or_null(curv_l[j], None)) + self.s_m_part
                    + ',"xy":' + _dumps(pts) + ',"tip_xy":' + _dumps(pts[-1])
                )
            out.append(shape + ',"chain_ok":' + ("true" if ok[j] else "false"))
        return out

    def _force_and_actuation(self, block, processed, idx: np.ndarray) -> list[str] | None:
        """``,"force_n":[x,y]`` (with a force model) and ``,"actuation":p`` (with a rig channel), or None."""
        force = None if processed is None else processed.force_n
        act = None if processed is None else processed.actuation
        if act is None and self.actuation is not None:
            act = self.actuation.value(block.codes[idx])
        elif act is not None:
            act = act[idx]
        if force is None and act is None:
            return None
        parts = [""] * idx.size
        if force is not None:
            f = force[idx].astype(np.float64)
            ok = np.isfinite(f).all(axis=1).tolist()
            fl = f.tolist()
            parts = [p + (',"force_n":[%.5f,%.5f]' % tuple(fl[j]) if ok[j] else ',"force_n":[null,null]')
                     for j, p in enumerate(parts)]
        if act is not None:
            al = np.asarray(act, dtype=np.float64).tolist()
            parts = [p + (',"actuation":%.6g' % al[j] if math.isfinite(al[j]) else ',"actuation":null')
                     for j, p in enumerate(parts)]
        return parts

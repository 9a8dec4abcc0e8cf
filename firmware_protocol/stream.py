"""Stream decoding: bytes in any chunking -> packets, failures counted by cause.

:class:`StreamDecoder` keeps the bytes after the last 0x00 between calls, so
feeding a stream in one piece or one byte at a time gives the same packets.
Sample packets of one length are decoded together with numpy (COBS, CRC and
field extraction over a 2-D array); only odd frames take the per-frame path.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .cobs import cobs_decode_columns
from .crc import crc16_columns
from .packets import (
    DROP_CAUSES,
    KIND_SAMPLES,
    Hello,
    Note,
    PacketError,
    Reply,
    Samples,
    decode_frame,
)

__all__ = ["SampleBlock", "StreamDecoder", "decode_stream", "MAX_FRAME_BYTES"]

#: longest frame the decoder accepts: a samples packet of 255 channels is 525
#: bytes stuffed; text packets (a hello with many extra keys) may be longer, up
#: to this. Longer runs without 0x00 are noise and are dropped (as ``cobs``).
MAX_FRAME_BYTES = 4096
#: a frame length seen at least this often in one feed is decoded in bulk
_BULK_MIN_ROWS = 4


@dataclass
class SampleBlock:
    """Consecutive sample packets with the same channel count, in stream order.

    Arrays are new and owned by whoever receives the block.

    Attributes
    ----------
    seq : ndarray of uint16, shape (M,)
        Wire sequence numbers (wrapping at 65536).
    t_us : ndarray of uint32, shape (M,)
        Device clock in microseconds (wrapping at 2**32).
    status : ndarray of uint8, shape (M,)
    codes : ndarray of uint16, shape (M, C)
    """

    seq: np.ndarray
    t_us: np.ndarray
    status: np.ndarray
    codes: np.ndarray

    def __len__(self) -> int:
        return int(self.seq.shape[0])

    @property
    def n_channels(self) -> int:
        return int(self.codes.shape[1])


@dataclass
class _Decoded:
    frame_index: list = field(default_factory=list)  # per-part frame indices
    seq: list = field(default_factory=list)
    t_us: list = field(default_factory=list)
    status: list = field(default_factory=list)
    codes: list = field(default_factory=list)


class StreamDecoder:
    """Incremental decoder for a device-to-host byte stream.

    Not thread-safe: one instance belongs to one reader thread.

    Parameters
    ----------
    max_frame_bytes : int
        A run of bytes this long with no 0x00 is discarded (counted as
        ``cobs``) so that noise cannot grow the buffer without bound.

    Attributes
    ----------
    drops : dict[str, int]
        Frames dropped so far, by cause (see :data:`firmware_protocol.DROP_CAUSES`).
    packets : int
        Good packets decoded so far, all kinds.
    bytes_in : int
        Bytes fed so far.
    """

    def __init__(self, *, max_frame_bytes: int = MAX_FRAME_BYTES):
        self.max_frame_bytes = int(max_frame_bytes)
        self.drops = {cause: 0 for cause in DROP_CAUSES}
        self.packets = 0
        self.bytes_in = 0
        self._pending = b""
        self._discarding = False

    @property
    def dropped(self) -> int:
        """Total frames dropped, all causes."""
        return sum(self.drops.values())

    def reset(self) -> None:
        """Forget a partial frame (after the port was reopened)."""
        self._pending = b""
        self._discarding = False

    def feed(self, data: bytes) -> list:
        """Decode what ``data`` completes.

        Returns
        -------
        list of SampleBlock, Hello, Reply or Note
            In stream order; consecutive sample packets of one channel count
            come as one :class:`SampleBlock`.
        """
        self.bytes_in += len(data)
        data = bytes(data)
        if self._discarding:
            # the rest of an overlong frame, already counted: skip to its delimiter
            zero = data.find(b"\x00")
            if zero < 0:
                return []
            data = data[zero + 1 :]
            self._discarding = False
        buf = self._pending + data if self._pending else data
        last = buf.rfind(b"\x00")
        if last < 0:
            self._pending = buf
            self._check_pending()
            return []
        self._pending = buf[last + 1 :]
        self._check_pending()
        return self._decode_complete(buf, last)

    def _check_pending(self) -> None:
        if len(self._pending) > self.max_frame_bytes:
            self.drops["cobs"] += 1
            self._pending = b""
            self._discarding = True

    def _decode_complete(self, buf: bytes, last: int) -> list:
        arr = np.frombuffer(buf, dtype=np.uint8, count=last + 1)
        starts, lengths = _frame_bounds(buf, arr, last)
        n_frames = starts.shape[0]
        if n_frames == 0:
            return []

        samples = _Decoded()
        controls: list[tuple[int, object]] = []
        slow = np.ones(n_frames, dtype=bool)

        counts = np.bincount(lengths)
        for enc_len in np.flatnonzero(counts >= _BULK_MIN_ROWS).tolist():
            if enc_len > 254 or enc_len < 12:
                continue
            idx = np.arange(n_frames) if counts[enc_len] == n_frames else np.flatnonzero(lengths == enc_len)
            cols = _gather_columns(arr, starts[idx], enc_len)
            dec, ok = cobs_decode_columns(cols)
            raw_len = enc_len - 1
            n_codes = (raw_len - 11) // 2
            if raw_len != 11 + 2 * n_codes:
                continue
            crc_rx = dec[raw_len - 2].astype(np.uint16) | (dec[raw_len - 1].astype(np.uint16) << 8)
            good = ok & (crc16_columns(dec[: raw_len - 2]) == crc_rx)
            good &= (dec[0] == KIND_SAMPLES) & (dec[8] == n_codes)
            # what fails here is sorted out, by cause, on the per-frame path
            sel = idx[good]
            if sel.size == 0:
                continue
            slow[sel] = False
            d = dec if sel.size == good.size else dec[:, good]
            head = np.ascontiguousarray(d[1:7].T)  # seq and t_us bytes, (M, 6)
            samples.frame_index.append(sel)
            samples.seq.append(head[:, 0:2].copy().view("<u2").ravel())
            samples.t_us.append(head[:, 2:6].copy().view("<u4").ravel())
            samples.status.append(d[7].copy())
            if n_codes:
                body = np.ascontiguousarray(d[9 : 9 + 2 * n_codes].T)  # (M, 2C) little-endian pairs
                samples.codes.append(body.view("<u2").astype(np.uint16, copy=False))
            else:
                samples.codes.append(np.zeros((sel.size, 0), dtype=np.uint16))

        overlong = slow & (lengths > self.max_frame_bytes)
        if overlong.any():
            # longer than any legal packet: dropped the same whether it came in one piece or many
            self.drops["cobs"] += int(overlong.sum())
            slow &= ~overlong
        for i in np.flatnonzero(slow).tolist():
            s = int(starts[i])
            frame = buf[s : s + int(lengths[i])]
            try:
                pkt = decode_frame(frame)
            except PacketError as exc:
                self.drops[exc.cause] += 1
                pkt = _packet_in_tail(frame)
                if pkt is None:
                    continue
            if isinstance(pkt, Samples):
                n = len(pkt.codes)
                samples.frame_index.append(np.array([i]))
                samples.seq.append(np.array([pkt.seq], dtype=np.uint16))
                samples.t_us.append(np.array([pkt.t_us], dtype=np.uint32))
                samples.status.append(np.array([pkt.status], dtype=np.uint8))
                samples.codes.append(np.array(pkt.codes, dtype=np.uint16).reshape(1, n))
            else:
                controls.append((i, pkt))

        n_samples = sum(len(f) for f in samples.frame_index)
        self.packets += n_samples + len(controls)
        return _in_order(samples, controls)


def _packet_in_tail(frame: bytes):
    """A whole packet at the end of a bad frame, or None.

    A device that resets in the middle of a packet starts the next one without
    a 0x00 in between: the cut bytes and a good packet arrive as one frame.
    The failed prefix is already counted; this finds the packet after it. Only
    frames that failed take this path, and a tail must pass the CRC like any
    packet. Candidate starts are the offsets whose chain of COBS code bytes
    ends exactly at the frame's end, found for all offsets at once by pointer
    doubling, so noise costs O(L log L), not O(L^2).
    """
    length = len(frame)
    if length < 4:
        return None
    codes = np.frombuffer(frame, dtype=np.uint8).astype(np.int64)
    # nxt[k]: where the code byte at k sends the decoder; L = exact end, L+1 = overshoot
    nxt = np.empty(length + 2, dtype=np.int64)
    nxt[:length] = np.minimum(np.arange(length) + codes, length + 1)
    nxt[length] = length
    nxt[length + 1] = length + 1
    for _ in range(int(length).bit_length()):
        nxt = nxt[nxt]
    for k in np.flatnonzero(nxt[1:length] == length).tolist():
        try:
            return decode_frame(frame[k + 1 :])
        except PacketError:
            continue
    return None


def _frame_bounds(buf: bytes, arr: np.ndarray, last: int) -> tuple[np.ndarray, np.ndarray]:
    """Start offsets and lengths of the non-empty frames in ``buf[: last + 1]``."""
    stride = buf.find(b"\x00") + 1
    total = last + 1
    # a clean stream of one packet size: zeros exactly every ``stride`` bytes
    if stride > 1 and total % stride == 0:
        m = total // stride
        if buf.count(b"\x00", 0, total) == m and not arr[stride - 1 :: stride].any():
            return np.arange(m, dtype=np.int64) * stride, np.full(m, stride - 1, dtype=np.int64)
    ends = np.flatnonzero(arr == 0)
    starts = np.empty_like(ends)
    starts[0] = 0
    starts[1:] = ends[:-1] + 1
    lengths = ends - starts
    keep = lengths > 0  # empty frames (0x00 0x00) are idle fill, not errors
    return starts[keep], lengths[keep]


def _gather_columns(arr: np.ndarray, starts: np.ndarray, length: int) -> np.ndarray:
    """Frames of one length as a transposed (length, M) array.

    A clean stream holds evenly spaced frames: then a strided view and one
    transposing copy do; otherwise a fancy-index gather.
    """
    m = starts.shape[0]
    first = int(starts[0])
    stride = length + 1
    if int(starts[-1]) - first == stride * (m - 1) and np.all(np.diff(starts) == stride):
        block = arr[first : first + stride * m].reshape(m, stride)[:, :length]
        return np.ascontiguousarray(block.T)
    return arr[np.arange(length)[:, None] + starts[None, :]]


def _in_order(samples: _Decoded, controls: list) -> list:
    """Merge decoded samples and control packets back into stream order."""
    out: list = []
    if not samples.frame_index:
        return [pkt for _, pkt in controls]
    if len(samples.frame_index) == 1 and not controls:
        # the common case: one clean run of one packet size
        return [SampleBlock(samples.seq[0], samples.t_us[0], samples.status[0], samples.codes[0])]
    parts_n = [c.shape[1] for c in samples.codes]
    fi = np.concatenate(samples.frame_index)
    order = np.argsort(fi, kind="stable")
    fi = fi[order]
    seq = np.concatenate(samples.seq)[order]
    t_us = np.concatenate(samples.t_us)[order]
    status = np.concatenate(samples.status)[order]
    single_width = len(set(parts_n)) == 1
    if single_width:
        codes = np.concatenate(samples.codes)[order]
        widths = None
    else:
        per_row = [row for part in samples.codes for row in part]
        codes = [per_row[k] for k in order.tolist()]
        widths = np.array([len(r) for r in codes])
    # cut points: before each control packet, and where the channel count changes
    cuts = set(np.searchsorted(fi, [i for i, _ in controls]).tolist())
    if widths is not None:
        cuts |= set((np.flatnonzero(np.diff(widths)) + 1).tolist())
    cuts = sorted(c for c in cuts if 0 < c < len(fi))
    bounds = [0, *cuts, len(fi)]
    blocks = []
    for a, b in zip(bounds[:-1], bounds[1:]):
        block_codes = codes[a:b] if single_width else np.stack(codes[a:b])
        blocks.append((int(fi[a]), SampleBlock(seq[a:b], t_us[a:b], status[a:b], block_codes)))
    merged = blocks + [(i, pkt) for i, pkt in controls]
    merged.sort(key=lambda item: item[0])
    out = [item for _, item in merged]
    return out


def decode_stream(data: bytes) -> tuple[list, dict]:
    """Decode a complete byte stream in one call.

    Returns
    -------
    items : list
        As :meth:`StreamDecoder.feed`; bytes after the last 0x00 are ignored.
    drops : dict[str, int]
        Dropped frames by cause.
    """
    dec = StreamDecoder()
    items = dec.feed(data)
    return items, dict(dec.drops)

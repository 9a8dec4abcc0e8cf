"""Benchmark: shape-stream latency at 1 kHz with several clients.

Run by hand: ``.venv/bin/python bench/bench_publish.py`` (``--quick`` for a
short check). A producer thread pushes frames into a :class:`FrameRing` at the
device rate, each block stamped ``t_host_s = time.monotonic()`` at "arrival",
as the serial reader does; a :class:`ShapePublisher` (calibrated, demo rig,
made-up calibration; ``--raw`` for codes only) serves them; the clients run in
a separate process, as a controller would, and note ``time.monotonic()`` when
each line arrives (the monotonic clock is system-wide, so the two processes
compare). Latency = arrival of the line at the client - arrival of the frame
at the host. Target: median under 2 ms at 1 kHz with 4 clients.
Prints the figures as JSON.
"""
from __future__ import annotations

import argparse
import json
import os
import selectors
import socket
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO))

from acquire.core.calibration import Calibration  # noqa: E402
from acquire.link.frames import FrameBlock, FrameRing  # noqa: E402
from acquire.serve.publish import ShapePublisher  # noqa: E402
from acquire.rig import load_rig  # noqa: E402


def run_clients(port: int, n_clients: int) -> None:
    """Client process: read every connection until the server closes; print arrival times as JSON."""
    sel = selectors.DefaultSelector()
    socks = []
    for k in range(n_clients):
        s = socket.create_connection(("127.0.0.1", port))
        s.setblocking(False)
        sel.register(s, selectors.EVENT_READ, k)
        socks.append(s)
    print("ready", flush=True)
    bufs = [bytearray() for _ in range(n_clients)]
    seqs = [[] for _ in range(n_clients)]
    arrival = [[] for _ in range(n_clients)]
    n_bytes = [0] * n_clients
    last = [b"" for _ in range(n_clients)]
    open_count = n_clients
    checked = 0
    while open_count:
        for key, _ in sel.select(1.0):
            k = key.data
            try:
                data = key.fileobj.recv(1 << 20)
            except BlockingIOError:
                continue
            now = time.monotonic()
            if not data:
                sel.unregister(key.fileobj)
                open_count -= 1
                continue
            n_bytes[k] += len(data)
            buf = bufs[k]
            buf += data
            end = buf.rfind(b"\n")
            if end < 0:
                continue
            for line in bytes(buf[:end]).split(b"\n"):
                seqs[k].append(int(line[7 : line.index(b",")]))  # lines start with {"seq":N,
                arrival[k].append(now)
                if checked % 500 == 0:  # a full parse now and then: the lines are JSON
                    json.loads(line)
                checked += 1
                last[k] = line
            del buf[: end + 1]
    for s in socks:
        s.close()
    dropped = [json.loads(line)["dropped"] if line else None for line in last]
    print(json.dumps({"seq": seqs, "arrival": arrival, "dropped": dropped, "bytes": n_bytes}))


def make_calibration(rig) -> Calibration:
    n = rig.n_segments
    return Calibration(
        r0_ohm=np.full(n, 8000.0), positive=[[60.0]] * n, negative=[[60.0]] * n,
        x_min=np.full(n, -0.5), x_max=np.full(n, 0.5), curvature_min_per_m=np.full(n, -30.0),
        curvature_max_per_m=np.full(n, 30.0), readout_kind="divider", rig={},
    )


def produce(ring: FrameRing, *, rate_hz: float, block_frames: int, duration_s: float, stamps: dict,
            push_s: list) -> None:
    """Producer thread: blocks of ``block_frames`` at the device rate; notes each frame's arrival."""
    n_total = int(duration_s * rate_hz)
    period = block_frames / rate_hz
    rng = np.random.default_rng(1)
    base = np.array([3500, 2900, 2300, 1700, 1100, 500], dtype=np.int64)
    t0 = time.monotonic()
    seq0 = 0
    k = 0
    while seq0 < n_total:
        due = t0 + k * period
        delay = due - time.monotonic()
        if delay > 0:
            time.sleep(delay)
        n = min(block_frames, n_total - seq0)
        seq = np.arange(seq0, seq0 + n, dtype=np.int64)
        codes = (base + rng.integers(-40, 40, (n, base.size))).astype(np.uint16)
        now = time.monotonic()
        a = time.perf_counter()
        ring.push(FrameBlock(codes=codes, seq=seq, t_device_s=seq / rate_hz, t_host_s=np.full(n, now),
                             status=np.zeros(n, dtype=np.uint8)))
        push_s.append(time.perf_counter() - a)
        stamps[seq0] = (now, n)
        seq0 += n
        k += 1


# long on purpose: a benchmark's one procedure, read top to bottom
def main(argv=None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="2 s run that only checks the benchmark works")
    ap.add_argument("--duration", type=float, default=10.0, help="seconds of streaming")
    ap.add_argument("--rate-hz", type=float, default=1000.0)
    ap.add_argument("--clients", type=int, default=4)
    ap.add_argument("--block-frames", type=int, default=1, help="frames per ring push (the reader's chunking)")
    ap.add_argument("--raw", action="store_true", help="no calibration: codes only")
    ap.add_argument("--client-port", type=int, help=argparse.SUPPRESS)  # internal: run as the client process
    args = ap.parse_args(argv)
    if args.client_port is not None:
        run_clients(args.client_port, args.clients)
        return {}
    duration = 2.0 if args.quick else args.duration
    rig = load_rig(None)
    ring = FrameRing(capacity_frames=int(args.rate_hz * 20), n_channels=rig.n_channels)
    pub = ShapePublisher.from_address(
        "127.0.0.1:0", ring=ring, rig=rig, calibration=None if args.raw else make_calibration(rig),
        rate_hz=args.rate_hz, adc_bits=12, counters=lambda: {"frames_lost": 0, "reconnects": 0}, announce=False,
    )
    pub.start()
    clients = subprocess.Popen(
        [sys.executable, __file__, "--client-port", str(pub.port), "--clients", str(args.clients)],
        stdout=subprocess.PIPE, text=True,
    )
    assert clients.stdout.readline().strip() == "ready"
    assert pub.wait_for_clients(args.clients, timeout_s=10.0)
    stamps: dict = {}
    push_s: list = []
    cpu0 = os.times()
    wall0 = time.monotonic()
    producer = threading.Thread(
        target=produce, args=(ring,),
        kwargs=dict(rate_hz=args.rate_hz, block_frames=args.block_frames, duration_s=duration, stamps=stamps,
                    push_s=push_s),
    )
    producer.start()
    producer.join()
    # let the last frames reach the clients, then close them (the client process ends on EOF)
    n_total = int(duration * args.rate_hz)
    deadline = time.monotonic() + 5.0
    while pub.stats()["messages_encoded"] < n_total and time.monotonic() < deadline:
        time.sleep(0.01)
    wall = time.monotonic() - wall0
    cpu1 = os.times()
    stats = pub.stats()
    time.sleep(0.2)  # sends still in the kernel drain to the client process
    pub.stop()
    out, _ = clients.communicate(timeout=60)
    got = json.loads(out)

    host_t = np.empty(n_total)
    for s0, (t, n) in stamps.items():
        host_t[s0 : s0 + n] = t
    per_client = []
    all_lat = []
    for k in range(args.clients):
        seq = np.asarray(got["seq"][k], dtype=np.int64)
        lat = np.asarray(got["arrival"][k]) - host_t[seq]
        all_lat.append(lat)
        per_client.append({
            "messages": int(seq.size),
            "in_order": bool((np.diff(seq) > 0).all()),
            "dropped": int(got["dropped"][k]),
            "median_latency_ms": float(np.median(lat) * 1e3),
            "p99_latency_ms": float(np.percentile(lat, 99) * 1e3),
        })
    lat = np.concatenate(all_lat)
    result = {
        "mode": "raw" if args.raw else "calibrated",
        "rate_hz": args.rate_hz,
        "clients": args.clients,
        "block_frames": args.block_frames,
        "duration_s": duration,
        "frames": n_total,
        "mean_message_bytes": float(sum(got["bytes"]) / max(1, sum(len(x) for x in got["seq"]))),
        "median_latency_ms": float(np.median(lat) * 1e3),
        "p90_latency_ms": float(np.percentile(lat, 90) * 1e3),
        "p99_latency_ms": float(np.percentile(lat, 99) * 1e3),
        "max_latency_ms": float(lat.max() * 1e3),
        "target_median_ms": 2.0,
        "target_met": bool(np.median(lat) < 2e-3),
        "producer_push_max_ms": float(max(push_s) * 1e3),
        "host_process_cpu_fraction": float(((cpu1.user - cpu0.user) + (cpu1.system - cpu0.system)) / wall),
        "publisher_lost": stats["publisher_lost"],
        "messages_encoded": stats["messages_encoded"],
        "per_client": per_client,
    }
    print(json.dumps(result, indent=1))
    return result


if __name__ == "__main__":
    main()

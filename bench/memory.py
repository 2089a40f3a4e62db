"""Peak memory of reading and preparing a >= 1 M-row x 6-channel log into windows.

The parent writes the demo fleet (more pumps, same scenario) as CSV; a fresh child
process then reads it with training.logs.read_logs and cuts it with
training.dataset.prepare, reporting its peak RSS (VmHWM) at each stage. Beside that it
prints the bytes that materialising every window as a float32 copy would need, and the
ratio: windows are views over one grid per asset, so memory follows the readings, not
readings x window.

    .venv/bin/python bench/memory.py [--assets 24 --days 31]
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))


def vm_hwm_bytes() -> int:
    """Peak resident set size of this process so far (Linux /proc/self/status)."""
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) * 1024
    import resource

    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024


def child(csv_path: str, events_path: str, window: int) -> None:
    from dataclasses import replace

    import numpy as np

    from training.config import DataConfig
    from training.dataset import PARTS, prepare_with, resolve_data_config
    from training.logs import read_events, read_logs

    cfg = replace(DataConfig(), window=window)
    out: dict[str, object] = {"rss_imports": vm_hwm_bytes()}
    t = time.perf_counter()
    logs = read_logs(csv_path)
    out["read_s"] = time.perf_counter() - t
    out["rss_read"] = vm_hwm_bytes()
    t = time.perf_counter()
    cfg = resolve_data_config(logs, cfg)  # grid steps from the data
    prep = prepare_with(logs, cfg, read_events(events_path))
    out["prepare_s"] = time.perf_counter() - t
    out["rss_prepared"] = vm_hwm_bytes()
    # Touch every training window once, a batch at a time, as an epoch would.
    ws = prep.parts["train"]
    total = 0.0
    for lo in range(0, len(ws), 4096):
        total += float(ws.gather(np.arange(lo, min(lo + 4096, len(ws)))).sum(dtype=np.float64))
    out["rss_epoch"] = vm_hwm_bytes()
    out.update(
        rows=logs.n_rows,
        channels=len(logs.channels),
        assets=len(logs.assets),
        window=cfg.window,
        stride=cfg.stride,
        train_stride=cfg.train_stride,
        windows={p: len(prep.parts[p]) for p in PARTS},
        grid_bytes=sum(g.values.nbytes for g in prep.grids.values()),
        log_bytes=sum(a.values.nbytes + a.times_s.nbytes for a in logs.assets.values()),
        checksum=total,
    )
    print(json.dumps(out))


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--assets", type=int, default=24)
    ap.add_argument("--days", type=float, default=31.0)
    ap.add_argument("--windows", default="60,240", help="window lengths to compare (grid points), comma-separated")
    ap.add_argument("--child", nargs=3, metavar=("CSV", "EVENTS", "WINDOW"), help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child:
        child(args.child[0], args.child[1], int(args.child[2]))
        return 0
    windows = [int(w) for w in args.windows.split(",")]

    from training import demo_data

    with tempfile.TemporaryDirectory(prefix="kilter-bench-") as tmp:
        t = time.perf_counter()
        demo = demo_data.generate(assets=args.assets, days=args.days, seed=7)
        gen_s = time.perf_counter() - t
        t = time.perf_counter()
        readings, events = demo_data.write(demo, tmp)
        write_s = time.perf_counter() - t
        size = readings.stat().st_size
        del demo
        results = []
        for w in windows:  # a fresh process each, so each peak is its own
            res = subprocess.run(
                [sys.executable, __file__, "--child", str(readings), str(events), str(w)],
                capture_output=True,
                text=True,
                check=True,
            )
            results.append(json.loads(res.stdout))
    mib = 1024.0**2
    first = results[0]
    print(
        f"{first['rows']:,} rows x {first['channels']} channels ({first['assets']} assets, {args.days:g} days), "
        f"CSV {size / mib:,.1f} MiB; generate {gen_s:.1f} s, write {write_s:.1f} s; "
        f"stride {first['stride']}, train stride {first['train_stride']}"
    )
    table: list[tuple[str, list[str]]] = []

    def row(name: str, fn) -> None:  # type: ignore[no-untyped-def]
        table.append((name, [fn(r) for r in results]))

    def copies(r: dict) -> float:  # type: ignore[type-arg]
        return sum(r["windows"].values()) * r["window"] * r["channels"] * 4.0  # float32 (N, W, C)

    row("window (grid points)", lambda r: f"{r['window']}")
    row("read_logs / prepare", lambda r: f"{r['read_s']:.1f} s / {r['prepare_s']:.1f} s")
    row("windows train / validation / calibration", lambda r: " / ".join(f"{r['windows'][p]:,}" for p in ("train", "validation", "calibration")))
    row("peak RSS after imports", lambda r: f"{r['rss_imports'] / mib:,.0f} MiB")
    row("peak RSS after read_logs", lambda r: f"{r['rss_read'] / mib:,.0f} MiB")
    row("peak RSS after prepare", lambda r: f"{r['rss_prepared'] / mib:,.0f} MiB")
    row("peak RSS after one pass over train windows", lambda r: f"{r['rss_epoch'] / mib:,.0f} MiB")
    row("readings held (float64 arrays)", lambda r: f"{r['log_bytes'] / mib:,.0f} MiB")
    row("grids held (float32, shared by all parts)", lambda r: f"{r['grid_bytes'] / mib:,.0f} MiB")
    row("all windows as float32 copies would need", lambda r: f"{copies(r) / mib:,.0f} MiB")
    row("copies / grids held", lambda r: f"{copies(r) / r['grid_bytes']:,.1f}x")
    row("copies / whole peak RSS", lambda r: f"{copies(r) / r['rss_epoch']:,.1f}x")
    row("prepare's own peak growth (after - before)", lambda r: f"{(r['rss_epoch'] - r['rss_read']) / mib:,.0f} MiB")
    width = max(len(k) for k, _ in table)
    cols = [max(len(v[i]) for _, v in table) for i in range(len(results))]
    print("| " + "figure".ljust(width) + " | " + " | ".join(f"W={r['window']}".ljust(c) for r, c in zip(results, cols)) + " |")
    print("|" + "-" * (width + 2) + "|" + "|".join("-" * (c + 2) for c in cols) + "|")
    for k, vals in table:
        print("| " + k.ljust(width) + " | " + " | ".join(v.ljust(c) for v, c in zip(vals, cols)) + " |")
    ratio = results[-1]["rss_epoch"] / results[0]["rss_epoch"]
    wr = results[-1]["window"] / results[0]["window"]
    print(f"peak RSS ratio W={results[-1]['window']} / W={results[0]['window']}: {ratio:.2f}x for a {wr:g}x longer window")
    return 0


if __name__ == "__main__":
    sys.exit(main())

"""Training throughput and peak memory on a >= 1 M-row x 6-channel log.

Generates the demo fleet with more pumps and days (in memory, no CSV), prepares it into
windows with training.dataset.prepare (views over the per-asset grid, not copies), runs one
short epoch of the default model, and prints windows/s and peak RSS beside the bytes that
materialising every training window as a copy would need.

    python bench/training.py [--assets 12 --days 60 --epoch-windows 20000 --threads 1]
"""

from __future__ import annotations

import argparse
import sys
import time
from dataclasses import replace
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))


def rss_mib() -> tuple[float, float]:
    """(current RSS, peak RSS) of this process in MiB, from /proc/self/status."""
    now = peak = 0.0
    with open("/proc/self/status", encoding="ascii") as f:
        for line in f:
            if line.startswith("VmRSS:"):
                now = int(line.split()[1]) / 1024
            elif line.startswith("VmHWM:"):
                peak = int(line.split()[1]) / 1024
    return now, peak


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--assets", type=int, default=12)
    parser.add_argument("--days", type=float, default=60.0)
    parser.add_argument("--epoch-windows", type=int, default=20000, help="training windows in the one timed epoch")
    parser.add_argument("--threads", type=int, default=1, help="torch threads (default 1; see training/bundle.py)")
    args = parser.parse_args()

    import numpy as np
    import torch

    from training import demo_data
    from training.config import DataConfig, FitConfig, ModelConfig
    from training.dataset import prepare_with, resolve_data_config
    from training.fit import fit, make_model
    from training.logs import Event, from_arrays

    base_rss, _ = rss_mib()
    t0 = time.perf_counter()
    demo = demo_data.generate(assets=args.assets, days=args.days, seed=7)
    logs = from_arrays(demo.times_s, demo.values, demo.channels, demo.units, source="<bench fleet>")
    t_gen = time.perf_counter() - t0
    events = [Event(e.asset, e.start_s, e.end_s, e.kind) for e in demo.events]
    del demo
    after_logs, _ = rss_mib()
    d = resolve_data_config(logs, DataConfig())  # grid steps from the data (60 s demo: window 60, stride 10)
    t0 = time.perf_counter()
    prepared = prepare_with(logs, d, events)
    t_prep = time.perf_counter() - t0
    after_prep, peak_prep = rss_mib()
    parts = prepared.parts
    c = len(prepared.channels)
    copies = sum(len(ws) for ws in parts.values()) * d.window * c * 4  # float32 copies of every window

    fc = replace(FitConfig(), epochs=1, max_train_windows=args.epoch_windows, threads=args.threads, max_validation_windows=2000)
    model = make_model(ModelConfig(), c, d.window, prepared.scaler_center, prepared.scaler_scale, fc.seed)
    torch.set_num_threads(args.threads)
    result = fit(model, parts["train"], parts["validation"], fc, progress=False)
    _, peak = rss_mib()

    rows = logs.n_rows
    print(f"log: {rows:,} rows x {c} channels ({args.assets} assets x {args.days:g} days), generated in {t_gen:.1f} s")
    print(f"prepare: {t_prep:.1f} s; windows train {len(parts['train']):,}, validation {len(parts['validation']):,}, "
          f"calibration {len(parts['calibration']):,}; torch threads {args.threads}")
    print()
    print("| figure | value |")
    print("|---|---:|")
    print(f"| rows | {rows:,} |")
    print(f"| training windows/s (one epoch of {result.windows_seen:,}, forward + backward + AdamW) | {result.windows_per_s:,.0f} |")
    print(f"| epoch wall time | {result.seconds:.1f} s |")
    print(f"| RSS before data | {base_rss:,.0f} MiB |")
    print(f"| RSS with logs in memory | {after_logs:,.0f} MiB |")
    print(f"| RSS after prepare | {after_prep:,.0f} MiB |")
    print(f"| peak RSS (whole run) | {peak:,.0f} MiB |")
    print(f"| all windows as float32 copies would need | {copies / 2**20:,.0f} MiB |")
    print(f"| copies / (peak RSS - RSS before data) | {copies / 2**20 / max(peak - base_rss, 1):.1f}x |")
    del np
    return 0


if __name__ == "__main__":
    sys.exit(main())

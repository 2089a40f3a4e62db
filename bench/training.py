"""Training throughput (before and after the fast path, side by side) and peak memory on a
>= 1 M-row x 6-channel log.

Generates the demo fleet with more pumps and days (in memory, no CSV), prepares it into
windows with training.dataset.prepare (views over the per-asset grid, not copies), then
times training.fit.train_step (the trainer's own step: gather, forward, loss, backward,
clip, AdamW) of the default model under several settings, taking turns in rounds so a
burst from another job lands on all of them, and keeps each setting's best round. Beside
windows/s it prints the achieved FLOP/s (forward + backward ~ 3x the forward's matmul
FLOPs) as a share of the one-thread float32 matmul rate measured with torch in the same run,
and peak RSS beside the bytes that materialising every training window would need.

    python bench/training.py [--assets 12 --days 60 --rounds 6 --round-s 4 --threads 1]
    python bench/training.py --quality 4000   # also one short fit per setting: validation loss

Settings: `before` is the trainer as it was (float32, batch 64, lr 3e-3); `bf16` is what
`kilter train --precision auto` does where the CPU has native bfloat16 (training/fit.py);
`b256` rows use batch 256 with the learning rate scaled by sqrt(4) = 2 (common practice
for adaptive optimisers, from memory); `2 threads` is the bf16 setting on two threads.
"""

from __future__ import annotations

import argparse
import sys
import time
from dataclasses import dataclass, replace
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


@dataclass(frozen=True)
class Setting:
    name: str
    precision: str
    batch: int
    lr_factor: float = 1.0
    threads: int = 1


SETTINGS = (
    Setting("before: float32, batch 64", "float32", 64),
    Setting("bf16 autocast, batch 64 (--precision auto)", "bfloat16", 64),
    Setting("float32, batch 256, lr x2", "float32", 256, 2.0),
    Setting("bf16 autocast, batch 256, lr x2", "bfloat16", 256, 2.0),
    Setting("bf16 autocast, batch 32", "bfloat16", 32),
    Setting("bf16 autocast, batch 64, 2 threads", "bfloat16", 64, 1.0, 2),
)


def matmul_rate(seconds: float) -> tuple[float, int]:
    """Best one-thread float32 torch matmul FLOP/s over a few square sizes, and the size."""
    import torch

    torch.set_num_threads(1)
    best, best_n = 0.0, 0
    for n in (256, 512, 1024):
        a, b = torch.rand(n, n), torch.rand(n, n)
        a @ b
        for _ in range(3):
            k, t0 = 0, time.perf_counter()
            while time.perf_counter() - t0 < seconds / 9:
                a @ b
                k += 1
            rate = 2 * n**3 * k / (time.perf_counter() - t0)
            if rate > best:
                best, best_n = rate, n
    return best, best_n


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--assets", type=int, default=12)
    parser.add_argument("--days", type=float, default=60.0)
    parser.add_argument("--rounds", type=int, default=6, help="rounds; every setting runs once a round")
    parser.add_argument("--round-s", type=float, default=4.0, help="seconds per setting per round")
    parser.add_argument("--threads", type=int, default=1, help="torch threads of the one-thread settings (default 1)")
    parser.add_argument("--quality", type=int, default=0, metavar="WINDOWS", help="also fit 2 epochs of WINDOWS per setting and print the validation loss")
    args = parser.parse_args()

    import numpy as np
    import torch

    from training import demo_data
    from training.config import DataConfig, FitConfig, ModelConfig
    from training.dataset import prepare_with, resolve_data_config
    from training.fit import cpu_has_native_bf16, even_subset, evaluate_loss, fit, make_model, make_optimiser, train_step
    from training.logs import Event, from_arrays
    from training.model import flops_per_window

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
    after_prep, _ = rss_mib()
    parts = prepared.parts
    train = parts["train"]
    c = len(prepared.channels)
    copies = sum(len(ws) for ws in parts.values()) * d.window * c * 4  # float32 copies of every window
    mc, fc0 = ModelConfig(), FitConfig()
    flops = flops_per_window(mc, c, d.window)
    native = cpu_has_native_bf16()
    settings = [s for s in SETTINGS if native or s.precision == "float32"]
    rng = np.random.default_rng(0)

    def runner(s: Setting):  # type: ignore[no-untyped-def]
        fc = replace(fc0, batch_size=s.batch, lr=fc0.lr * s.lr_factor, precision=s.precision)  # type: ignore[arg-type]
        model = make_model(mc, c, d.window, prepared.scaler_center, prepared.scaler_scale, fc.seed)
        model.train()
        opt = make_optimiser(model, fc)

        def one_round(budget: float) -> float:
            torch.set_num_threads(s.threads if s.threads > 1 else args.threads)
            n, t = 0, time.perf_counter()
            while time.perf_counter() - t < budget:
                part = np.sort(rng.choice(len(train), size=s.batch, replace=False))
                x = torch.from_numpy(np.ascontiguousarray(train.gather(part), dtype=np.float32))
                train_step(model, opt, x, fc, s.precision == "bfloat16")
                n += s.batch
            return n / (time.perf_counter() - t)

        one_round(0.5)  # warm-up (oneDNN primitives, allocator)
        return one_round

    runners = [runner(s) for s in settings]
    best = [0.0] * len(settings)
    mm_best = 0.0
    mm_n = 0
    for _ in range(args.rounds):
        rate, n = matmul_rate(1.0)
        if rate > mm_best:
            mm_best, mm_n = rate, n
        for i, run in enumerate(runners):
            best[i] = max(best[i], run(args.round_s))
    _, peak = rss_mib()

    rows = logs.n_rows
    print(f"log: {rows:,} rows x {c} channels ({args.assets} assets x {args.days:g} days), generated in {t_gen:.1f} s")
    print(f"prepare: {t_prep:.1f} s; windows train {len(train):,}, validation {len(parts['validation']):,}, "
          f"calibration {len(parts['calibration']):,}")
    print(f"model: {flops / 1e6:.2f} MFLOP per window forward (x3 for forward + backward); CPU native bfloat16: "
          f"{'yes' if native else 'no (bfloat16 rows skipped)'}; torch {torch.__version__}")
    print(f"torch float32 matmul, 1 thread: {mm_best / 1e9:.1f} GFLOP/s (best at {mm_n}x{mm_n}); "
          f"best of {args.rounds} rounds x {args.round_s:g} s per setting, settings taking turns")
    print()
    print("| setting | training windows/s | x before | GFLOP/s (fwd+bwd) | share of 1-thread fp32 matmul |")
    print("|---|---:|---:|---:|---:|")
    for s, r in zip(settings, best, strict=True):
        gflops = r * 3 * flops / 1e9
        print(f"| {s.name} | {r:,.0f} | {r / best[0]:.2f}x | {gflops:.1f} | {gflops * 1e9 / mm_best:.0%} |")
    print()
    print("| memory | value |")
    print("|---|---:|")
    print(f"| RSS before data | {base_rss:,.0f} MiB |")
    print(f"| RSS with logs in memory | {after_logs:,.0f} MiB |")
    print(f"| RSS after prepare | {after_prep:,.0f} MiB |")
    print(f"| peak RSS (whole run) | {peak:,.0f} MiB |")
    print(f"| all windows as float32 copies would need | {copies / 2**20:,.0f} MiB |")
    print(f"| copies / (peak RSS - RSS before data) | {copies / 2**20 / max(peak - base_rss, 1):.1f}x |")

    if args.quality:
        print()
        print(f"| setting | validation loss after 2 epochs x {args.quality:,} windows (float32 evaluation) | x before |")
        print("|---|---:|---:|")
        losses = []
        val_idx = even_subset(len(parts["validation"]), 2000)
        for s in settings:
            if s.threads > 1:
                continue
            fc = replace(fc0, epochs=2, patience=2, batch_size=s.batch, lr=fc0.lr * s.lr_factor, precision=s.precision,  # type: ignore[arg-type]
                         max_train_windows=args.quality, max_validation_windows=2000, threads=args.threads)
            model = make_model(mc, c, d.window, prepared.scaler_center, prepared.scaler_scale, fc.seed)
            fit(model, train, parts["validation"], fc, progress=False)
            loss = evaluate_loss(model, parts["validation"], val_idx, replace(fc, loss="mse"))
            losses.append(loss)
            print(f"| {s.name} | {loss:.5f} | {loss / losses[0]:.3f} |")
    return 0


if __name__ == "__main__":
    sys.exit(main())

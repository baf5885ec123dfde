"""Probe demo: a BatchNorm network against a GroupNorm one at small batch sizes.

Scenario (invented for this demo): a pump maker classifies 16x16 vibration spectrogram
tiles (time x frequency) from its pumps into three states: *healthy* (a few steady
harmonic lines), *bearing wear* (extra side-band lines that drift in frequency) and
*cavitation* (broadband bursts in the upper frequencies).  Two sites send data: site A,
where the models are trained, and site B, whose sensors have a higher gain and a DC
offset.  All data is synthetic and made up here.

The demo trains two small CNNs on site A, identical except for their normalization
(BatchNorm2d vs GroupNorm with 4 groups), then asks the probe three questions:

1. At which batch size do BatchNorm's batch statistics get too noisy?  (The GroupNorm
   network's statistics are per sample: they do not depend on the batch size.)
2. Are the BatchNorm network's running statistics right for site B?  (No: stale.)
3. Does exact recalibration on some site-B batches repair them?

Run it::

    python examples/probe_bn_vs_gn.py [--out DIR]      # DIR gets JSON and PNG files

The factories below also work with the command line, e.g.::

    shiftwatch probe --model examples/probe_bn_vs_gn.py:bn_model \\
        --data examples/probe_bn_vs_gn.py:site_b_batches --recalibrate

Accuracies printed here are for this toy scenario only; they illustrate the probe's
findings and are not benchmarks of either normalization.
"""

from __future__ import annotations

import argparse
import json
import math
from pathlib import Path

import torch
import torch.nn.functional as F
from torch import nn

from shiftwatch.probe import probe_normalization, recalibrate

SIZE = 16
CLASSES = ("healthy", "bearing wear", "cavitation")


def make_tiles(n: int, *, site: str = "A", seed: int = 0) -> tuple[torch.Tensor, torch.Tensor]:
    """``n`` spectrogram tiles ``(n, 1, 16, 16)`` with labels ``(n,)``; site B has a sensor
    gain of 1.8 and an offset of +0.6."""
    g = torch.Generator().manual_seed(seed)
    y = torch.randint(0, 3, (n,), generator=g)
    freq = torch.arange(SIZE, dtype=torch.float32).view(1, 1, SIZE)
    time = torch.arange(SIZE, dtype=torch.float32).view(1, SIZE, 1)
    base = torch.randint(2, 5, (n, 1, 1), generator=g).float()
    x = 0.3 * torch.randn(n, SIZE, SIZE, generator=g)
    for k in (1, 2, 3):  # steady harmonic lines at multiples of the running speed
        x += torch.exp(-((freq - k * base) ** 2) / 0.5)
    drift = 0.15 * time * torch.rand(n, 1, 1, generator=g)
    wear = torch.exp(-((freq - 1.5 * base - drift) ** 2) / 0.4)
    bursts = (torch.rand(n, SIZE, 1, generator=g) < 0.4).float() * (freq >= 10).float()
    x += (y == 1).float().view(n, 1, 1) * 0.8 * wear
    x += (y == 2).float().view(n, 1, 1) * 0.9 * bursts * torch.rand(n, SIZE, SIZE, generator=g)
    if site == "B":
        x = 1.8 * x + 0.6
    return x.unsqueeze(1), y


def build(norm: str) -> nn.Module:
    """The CNN; ``norm`` is ``"batch"`` or ``"group"``."""
    def layer(c: int) -> nn.Module:
        return nn.BatchNorm2d(c) if norm == "batch" else nn.GroupNorm(4, c)

    return nn.Sequential(
        nn.Conv2d(1, 16, 3, padding=1), layer(16), nn.ReLU(), nn.MaxPool2d(2),
        nn.Conv2d(16, 32, 3, padding=1), layer(32), nn.ReLU(),
        nn.AdaptiveAvgPool2d(1), nn.Flatten(), nn.Linear(32, 3),
    )


def train(model: nn.Module, x: torch.Tensor, y: torch.Tensor, *, epochs: int = 3,
          batch_size: int = 32, seed: int = 0) -> nn.Module:
    torch.manual_seed(seed)
    opt = torch.optim.Adam(model.parameters(), lr=5e-3)
    model.train()
    for _ in range(epochs):
        perm = torch.randperm(len(x))
        for i in range(0, len(x), batch_size):
            idx = perm[i : i + batch_size]
            loss = F.cross_entropy(model(x[idx]), y[idx])
            opt.zero_grad()
            loss.backward()
            opt.step()
    return model.eval()


def accuracy(model: nn.Module, x: torch.Tensor, y: torch.Tensor) -> float:
    model.eval()
    with torch.no_grad():
        return float((model(x).argmax(1) == y).float().mean())


# ---- factories for `shiftwatch probe --model FILE:FACTORY --data FILE:FACTORY`
def bn_model() -> nn.Module:
    """The BatchNorm network, trained on site A (seeded: the same model every call)."""
    return train(build("batch"), *make_tiles(1200, site="A", seed=1))


def gn_model() -> nn.Module:
    """The GroupNorm network, trained on site A."""
    return train(build("group"), *make_tiles(1200, site="A", seed=1))


def site_a_batches() -> list[torch.Tensor]:
    """Held-out site-A tiles in batches of 64 (inputs only)."""
    return list(make_tiles(384, site="A", seed=2)[0].split(64))


def site_b_batches() -> list[torch.Tensor]:
    """Site-B tiles in batches of 64: the calibration set."""
    return list(make_tiles(384, site="B", seed=3)[0].split(64))


def main(argv: list[str] | None = None) -> dict:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--out", type=Path, help="directory for JSON and PNG outputs")
    args = parser.parse_args(argv)

    bn, gn = bn_model(), gn_model()
    xa, ya = make_tiles(384, site="A", seed=2)
    xb_test, yb_test = make_tiles(384, site="B", seed=4)
    print(f"site A accuracy: BatchNorm net {accuracy(bn, xa, ya):.2f}, "
          f"GroupNorm net {accuracy(gn, xa, ya):.2f}")

    print("\n=== 1. Batch-size sensitivity on site A (held-out) ===\n")
    probe_bn = probe_normalization(bn, xa.split(64))
    probe_gn = probe_normalization(gn, xa.split(64))
    print(probe_bn.to_text())
    print()
    print(probe_gn.to_text())
    worst = max((lr for lr in probe_bn.layers if lr.batch_sizes),
                key=lambda lr: lr.batch_sizes[2].kl_p90)
    print(f"\nBatchNorm layer {worst.name}: KL p90 {worst.batch_sizes[2].kl_p90:.3f} nats/channel "
          f"at b=2 vs {worst.batch_sizes[32].kl_p90:.4f} at b=32; every BatchNorm layer is "
          f"within tolerance from b={probe_bn.recommended_batch_size}.  The GroupNorm layers "
          "normalize each sample by itself: no batch dependence.")

    print("\n=== 2. Running statistics against site B ===\n")
    probe_b = probe_normalization(bn, site_b_batches())
    print(probe_b.to_text())
    print(f"\nstale layers at site B: {probe_b.stale_layers}")

    print("\n=== 3. Recalibration on site-B batches (a copy; the model stays as it was) ===\n")
    rec = recalibrate(bn, site_b_batches())
    for name in rec.before:
        print(f"layer {name}: KL {rec.before[name].kl:.3f} -> {rec.after[name].kl:.1e} "
              "(same batches)")
    held = probe_normalization(rec.model, xb_test.split(64))
    kl_held = {lr.name: lr.running_stats.kl for lr in held.layers if lr.running_stats}
    print("held-out site-B KL after recalibration: "
          + ", ".join(f"{k} {v:.4f}" for k, v in kl_held.items()))
    acc = {
        "bn_site_b_before": accuracy(bn, xb_test, yb_test),
        "bn_site_b_recalibrated": accuracy(rec.model, xb_test, yb_test),
        "gn_site_b": accuracy(gn, xb_test, yb_test),
    }
    print(f"site B accuracy: BatchNorm net {acc['bn_site_b_before']:.2f} as trained, "
          f"{acc['bn_site_b_recalibrated']:.2f} recalibrated; GroupNorm net "
          f"{acc['gn_site_b']:.2f} (it has no running statistics to recalibrate)")

    if args.out:
        args.out.mkdir(parents=True, exist_ok=True)
        for tag, res in (("site_a_bn", probe_bn), ("site_a_gn", probe_gn),
                         ("site_b_bn", probe_b)):
            (args.out / f"probe_{tag}.json").write_text(json.dumps(res.to_dict(), indent=2))
        try:
            from shiftwatch.probe import plot_probe

            plot_probe(probe_bn, args.out / "probe_site_a_bn.png")
        except ImportError as exc:
            print(f"(no plot: {exc})")
        print(f"\nwrote results to {args.out}")
    return {
        "probe_bn": probe_bn, "probe_gn": probe_gn, "probe_site_b": probe_b,
        "held_out_kl_after": kl_held, "accuracy": acc,
        "kl_ratio_2_vs_32": worst.batch_sizes[2].kl_p90 / max(worst.batch_sizes[32].kl_p90,
                                                              math.ulp(0.0)),
    }


if __name__ == "__main__":
    main()

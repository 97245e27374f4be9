"""A template for your own training loop: mine between epochs, score between epochs.

The "model" here is a linear projection W (64 feature values -> ``--dim``) on the frozen feature
vectors of the demo scenario (an invented grey seal survey; ``tripletkit.scenario``). It stands in
for your network: wherever this script multiplies by W, your framework runs its forward pass,
and wherever it applies the gradient, your framework's autograd and optimiser do it.

Each epoch:

1. embed the training photos with the current model and dump them to Parquet
   (``tripletkit.write_table``), as a training job dumps its embeddings;
2. mine the triplets of this epoch from that dump (``tripletkit.mine(dump, out=...)``);
3. stream the triplets in shuffled batches of row positions of the dump
   (``tripletkit.iter_triplet_batches``): any framework gathers its own tensors from positions;
   train with the triplet loss and its gradient with respect to the raw (pre-normalisation)
   embeddings (``tripletkit.triplet_loss_grad``), here with Adam written out in numpy;
4. score the held-out seals, identities never trained on (``tripletkit.score``), and print the
   equal error rate.

Run it from the repository (or anywhere, after ``pip install``)::

    python examples/train_loop.py --epochs 5
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from tripletkit import EmbeddingTable, iter_triplet_batches, mine, score, triplet_loss_grad, write_table
from tripletkit.config import EvaluationConfig, MiningConfig
from tripletkit.scenario import demo_paths


def parse_args(argv=None):
    p = argparse.ArgumentParser(description="Train a projection with tripletkit's miner and loss on the demo features.")
    p.add_argument("--epochs", type=int, default=5, help="epochs (default: 5)")
    p.add_argument("--margin", type=float, default=0.2, help="margin alpha of the miner and the loss (default: 0.2)")
    p.add_argument("--dim", type=int, default=16, help="output dimension of the projection (default: 16)")
    p.add_argument("--learning-rate", type=float, default=0.01, help="Adam step size (default: 0.01)")
    p.add_argument("--batch", type=int, default=256, help="triplets per gradient step (default: 256)")
    p.add_argument("--seed", type=int, default=0, help="seed of the initial weights, batches and miner (default: 0)")
    p.add_argument("--data", default="tripletkit-demo-data",
                   help="folder to generate the demo tables into when the repository's demo_data/ is not there")
    args = p.parse_args(argv)
    if args.epochs < 1 or args.dim < 1 or args.batch < 1 or not args.margin > 0 or not args.learning_rate > 0:
        p.error("--epochs, --dim and --batch must be >= 1; --margin and --learning-rate must be > 0")
    return args


class Adam:
    """Adam (Kingma and Ba, "Adam: A Method for Stochastic Optimization", ICLR 2015) for one matrix."""

    def __init__(self, shape, lr, beta1=0.9, beta2=0.999, eps=1e-8):
        self.lr, self.b1, self.b2, self.eps = lr, beta1, beta2, eps
        self.m, self.v, self.t = np.zeros(shape), np.zeros(shape), 0

    def step(self, w, grad):
        self.t += 1
        self.m = self.b1 * self.m + (1 - self.b1) * grad
        self.v = self.b2 * self.v + (1 - self.b2) * grad * grad
        m_hat = self.m / (1 - self.b1**self.t)
        v_hat = self.v / (1 - self.b2**self.t)
        return w - self.lr * m_hat / (np.sqrt(v_hat) + self.eps)


def heldout_eer(W, heldout):
    """Score the held-out identities embedded by W; return the report's EER (a fraction)."""
    cfg = EvaluationConfig(bootstrap=0, clustering=False, plots=False)  # fast: no intervals, no k-means
    report = score((heldout.ids, heldout.original_labels(), heldout.embeddings @ W), config=cfg, quiet=True)
    return report["verification"]["eer"]


def train_epoch(W, opt, train, margin, batch, work, epoch, seed):
    """Dump, mine, then one pass of minibatch updates; returns (W, mining summary, mean loss)."""
    X = train.embeddings.astype(np.float64)  # frozen inputs (unit rows)
    # 1. the model's embeddings of the training photos, dumped as a training job would
    dump = write_table(Path(work) / f"epoch-{epoch}.parquet", train.ids, train.original_labels(), X @ W)
    # 2. this epoch's triplets, mined from the dump
    out = Path(work) / f"epoch-{epoch}-triplets.parquet"
    summary = mine(dump, out, config=MiningConfig(margin=margin, seed=seed), quiet=True)
    losses = []
    # 3. shuffled batches of row positions in the dump's order (the order of X)
    for a, p, n in iter_triplet_batches(out, dump, batch_size=batch, seed=seed):
        # the loss and its gradient with respect to the raw embeddings of each triplet's rows ...
        loss, g_a, g_p, g_n = triplet_loss_grad(X[a] @ W, X[p] @ W, X[n] @ W, margin=margin)
        # ... back-propagated through the linear model: d(X W)/dW contributes X^T g
        grad = X[a].T @ g_a + X[p].T @ g_p + X[n].T @ g_n
        W = opt.step(W, grad)
        losses.append(loss)
    return W, summary, (float(np.mean(losses)) if losses else None)


def main(argv=None):
    args = parse_args(argv)
    t0 = time.perf_counter()
    paths = demo_paths(cache_dir=args.data)
    train = EmbeddingTable.read(paths["train_features"])
    heldout = EmbeddingTable.read(paths["heldout_features"])
    rng = np.random.default_rng(args.seed)
    W = rng.normal(size=(train.dim, args.dim)) / np.sqrt(train.dim)
    opt = Adam(W.shape, args.learning_rate)
    print(f"train: {train.n} photos of {train.n_identities} seals; held out: {heldout.n} photos of "
          f"{heldout.n_identities} other seals; features {train.dim} -> embeddings {args.dim}")
    print(f"epoch 0: held-out EER {100 * heldout_eer(W, heldout):.2f} % (random projection)")
    with tempfile.TemporaryDirectory(prefix="tripletkit-train-") as work:  # this run's dumps and triplets
        for epoch in range(1, args.epochs + 1):
            W, summary, loss = train_epoch(W, opt, train, args.margin, args.batch, work, epoch, seed=args.seed + epoch)
            eer = heldout_eer(W, heldout)
            # active_fraction is None when nothing was mined (a degenerate epoch warns instead of failing)
            active = "n/a" if summary.active_fraction is None else f"{summary.active_fraction:.2f}"
            print(f"epoch {epoch}: {summary.n_triplets} triplets mined ({summary.regimes['semi-hard']} semi-hard, "
                  f"{summary.regimes['hard']} hard, active {active}), mean loss "
                  f"{'n/a' if loss is None else f'{loss:.4f}'}, held-out EER {100 * eer:.2f} %")
    print(f"done in {time.perf_counter() - t0:.1f} s")
    return 0


if __name__ == "__main__":
    sys.exit(main())

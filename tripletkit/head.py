"""A small projection head fitted with the triplet loss (numpy only), for margin sweeps.

The head maps frozen feature vectors to unit embeddings: rows are L2-normalised, standardised with
the training rows' per-feature mean and spread, mapped linearly (``z = s W``) or through one
hidden ReLU layer (``z = relu(s W1 + b1) W2 + b2``) and L2-normalised. :func:`fit_head` trains it
as a user would train a real model with this package: every epoch it mines triplets on the head's
outputs with :func:`tripletkit.mining.mine`, back-propagates the gradient of
:func:`tripletkit.losses.triplet_loss_grad` through the layers by hand and steps with an
optimiser of :mod:`tripletkit.optimizers`.

Parameters are float64, the initialisation and the minibatch order come from one seeded
generator, the per-epoch mining seed is ``mining.seed + epoch``, and gradients of repeated rows are
summed in a fixed order (``np.add.at``): the same inputs, configs and seed give the same weights
bit for bit on one machine and numpy/BLAS build.

References
----------
.. [1] K. He, X. Zhang, S. Ren, J. Sun, "Delving Deep into Rectifiers", ICCV 2015 (the
   N(0, 2 / fan_in) initialisation of a ReLU layer).
"""

from __future__ import annotations

import contextlib
import dataclasses
import time
import warnings
from pathlib import Path

import numpy as np

from ._blocked import matmul, matmul_tn
from ._errors import TripletkitError, TripletkitWarning
from ._io import atomic_path, say
from ._validate import as_embeddings, check_margin, row_norms, whole_number
from .config import HeadConfig, MiningConfig
from .losses import triplet_loss, triplet_loss_grad
from .mining.regimes import REGIMES
from .optimizers import make_optimizer

__all__ = ["ProjectionHead", "fit_head", "HeadDiverged", "describe_epoch"]

#: Written into every saved head; :meth:`ProjectionHead.load` refuses other formats.
_FORMAT = "tripletkit-projection-head-1"
_LINEAR_KEYS = ("weight",)
_HIDDEN_KEYS = ("weight_1", "bias_1", "weight_2", "bias_2")
# Features whose training spread is below this are only centred, not scaled (constant pixels).
_MIN_SCALE = 1e-8


class HeadDiverged(TripletkitError):
    """The head's numbers broke down: weights or outputs overflowed, or rows map to the zero vector.

    ``what`` says what happened (for :func:`fit_head` to say at which margin and epoch);
    ``overflow`` is False for zero outputs, which a fresh head can also produce.
    """

    def __init__(self, what, message=None, overflow=True):
        super().__init__(message or f"{what}: the fit diverged; lower [head] learning_rate")
        self.what, self.overflow = what, overflow


def _finite(arrays, what):
    """Raise :class:`HeadDiverged` unless every array holds finite numbers only."""
    if not all(np.isfinite(a).all() for a in arrays):
        raise HeadDiverged(f"{what} overflowed to Inf/NaN")


class ProjectionHead:
    """Linear map (optionally one hidden ReLU layer) followed by L2 normalisation.

    Parameters
    ----------
    params : dict of str -> ndarray
        ``shift`` and ``scale`` (d_in,): the input standardisation; then either ``weight``
        (d_in, dim) for a linear head, or ``weight_1`` (d_in, hidden), ``bias_1`` (hidden,),
        ``weight_2`` (hidden, dim), ``bias_2`` (dim,) for a head with one hidden ReLU layer.
        Stored as float64 copies. Use :meth:`initialise` to draw a fresh head.

    Attributes
    ----------
    d_in, dim, hidden : int
        Input dimension, output dimension, hidden units (0 for a linear head).
    params : dict of str -> ndarray
        The parameters (float64). ``shift``/``scale`` are fixed; the rest is trained.

    Examples
    --------
    >>> X = np.random.default_rng(0).normal(size=(50, 8))
    >>> head = ProjectionHead.initialise(X, dim=3, seed=0)
    >>> head.transform(X).shape
    (50, 3)
    """

    def __init__(self, params):
        params = {k: np.array(v, dtype=np.float64) for k, v in params.items()}
        keys = set(params) - {"shift", "scale"}
        if keys == set(_LINEAR_KEYS):
            hidden = 0
            shapes = {"weight": 2}
        elif keys == set(_HIDDEN_KEYS):
            hidden = params["weight_1"].shape[1] if params["weight_1"].ndim == 2 else -1
            shapes = {"weight_1": 2, "bias_1": 1, "weight_2": 2, "bias_2": 1}
        else:
            raise TripletkitError(
                f"head parameters {sorted(params)} are neither a linear head (shift, scale, weight) nor a "
                "hidden-layer head (shift, scale, weight_1, bias_1, weight_2, bias_2)"
            )
        for k, nd in {"shift": 1, "scale": 1, **shapes}.items():
            if params[k].ndim != nd:
                raise TripletkitError(f"head parameter {k!r} must have {nd} dimensions, got shape {params[k].shape}")
            if not np.isfinite(params[k]).all():
                raise TripletkitError(f"head parameter {k!r} has NaN or Inf values")
        d_in = params["shift"].shape[0]
        first = params["weight"] if hidden == 0 else params["weight_1"]
        last = params["weight"] if hidden == 0 else params["weight_2"]
        ok = params["scale"].shape == (d_in,) and first.shape[0] == d_in and bool((params["scale"] > 0).all())
        if hidden:
            ok = ok and params["bias_1"].shape == (hidden,) and last.shape[0] == hidden \
                and params["bias_2"].shape == (last.shape[1],)
        if not ok or last.shape[1] < 1:
            raise TripletkitError(
                "head parameters have inconsistent shapes: "
                + ", ".join(f"{k} {tuple(v.shape)}" for k, v in sorted(params.items()))
            )
        self.params = params
        self.d_in = int(d_in)
        self.dim = int(last.shape[1])
        self.hidden = int(hidden)

    # -- construction ------------------------------------------------------------------------
    @classmethod
    def initialise(cls, X, dim=16, hidden=0, seed=0):
        """A fresh head for inputs like ``X``: standardisation from ``X``, random weights.

        Parameters
        ----------
        X : array-like of shape (n, d_in)
            Training inputs (rows are L2-normalised first); their per-feature mean and standard
            deviation become ``shift`` and ``scale``.
        dim : int, default 16
            Output dimension.
        hidden : int, default 0
            Units of one hidden ReLU layer; 0 gives a linear head.
        seed : int or numpy.random.Generator, default 0

        Notes
        -----
        Weights are Gaussian with variance 1 / fan_in (linear layers) or 2 / fan_in (the ReLU
        layer, [1]_), biases 0, so that the outputs start at a similar scale whatever d_in is
        (the scale of ``z`` does not change the loss, which normalises it, but it sets the size of
        the gradient).
        """
        dim, hidden = whole_number(dim, "dim", low=1), whole_number(hidden, "hidden", low=0)
        S = as_embeddings(X, "head inputs", normalise=True, dtype=np.float64)
        rng = np.random.default_rng(seed)
        shift = S.mean(axis=0)
        scale = S.std(axis=0)
        scale = np.where(scale > _MIN_SCALE, scale, 1.0)
        d_in = S.shape[1]
        params = {"shift": shift, "scale": scale}
        if hidden == 0:
            params["weight"] = rng.normal(scale=np.sqrt(1.0 / d_in), size=(d_in, dim))
        else:
            params["weight_1"] = rng.normal(scale=np.sqrt(2.0 / d_in), size=(d_in, hidden))
            params["bias_1"] = np.zeros(hidden)
            params["weight_2"] = rng.normal(scale=np.sqrt(1.0 / hidden), size=(hidden, dim))
            params["bias_2"] = np.zeros(dim)
        return cls(params)

    @property
    def trainable(self):
        """Names of the trained parameters, in a fixed order."""
        return _LINEAR_KEYS if self.hidden == 0 else _HIDDEN_KEYS

    # -- forward and backward ----------------------------------------------------------------
    def standardise(self, X):
        """L2-normalise the rows of ``X`` and standardise them: float64 (n, d_in)."""
        S = as_embeddings(X, "head inputs", normalise=True, dtype=np.float64)
        if S.shape[1] != self.d_in:
            raise TripletkitError(
                f"head inputs have dimension {S.shape[1]} but the head was fitted on dimension {self.d_in}; "
                "give it the same kind of feature vectors"
            )
        return (S - self.params["shift"]) / self.params["scale"]

    def _forward(self, S):
        """Raw outputs z (before normalisation) of standardised rows, and what backward needs.

        Raises :class:`HeadDiverged` when an output is not finite (weights grown beyond float64).
        """
        p = self.params
        with np.errstate(over="ignore", invalid="ignore"):
            if self.hidden == 0:
                Z, cache = matmul(S, p["weight"]), (S,)
            else:
                pre = matmul(S, p["weight_1"]) + p["bias_1"]
                H = np.maximum(pre, 0.0)
                Z, cache = matmul(H, p["weight_2"]) + p["bias_2"], (S, pre, H)
        _finite([Z], "the projection head's raw outputs")
        return Z, cache

    def _backward(self, cache, dZ):
        """Gradients of the trained parameters from dL/dz (float64 (n, dim))."""
        if self.hidden == 0:
            (S,) = cache
            return {"weight": matmul_tn(S, dZ)}
        S, pre, H = cache
        p = self.params
        dH = matmul(dZ, p["weight_2"].T)
        dpre = np.where(pre > 0.0, dH, 0.0)  # ReLU subgradient 0 at 0
        return {"weight_1": matmul_tn(S, dpre), "bias_1": dpre.sum(axis=0),
                "weight_2": matmul_tn(H, dZ), "bias_2": dZ.sum(axis=0)}

    def raw(self, X):
        """Raw outputs z of inputs ``X`` (float64 (n, dim), before the final normalisation)."""
        return self._forward(self.standardise(X))[0]

    def transform(self, X):
        """Unit embeddings of inputs ``X``: float32 (n, dim), C-contiguous.

        Parameters
        ----------
        X : array-like of shape (n, d_in)

        Returns
        -------
        ndarray of float32, shape (n, dim)
        """
        return self._unit_outputs(self.raw(X))

    @staticmethod
    def _unit_outputs(Z):
        norms = row_norms(Z)  # raw outputs may be huge: no overflow in the sum of squares
        zero = ~(norms > 0)
        if zero.any():
            rows = np.flatnonzero(zero)[:5].tolist()
            raise HeadDiverged(
                f"it maps {int(zero.sum())} rows to the zero vector (first row positions: {rows}; every hidden unit "
                "is off for them)",
                f"the head maps {int(zero.sum())} input rows to the zero vector (first row positions: {rows}), which "
                "has no direction; refit with another seed", overflow=False)
        return np.ascontiguousarray(Z / norms[:, None], dtype=np.float32)

    def loss_and_grad(self, S, anchor, positive, negative, margin, distance="squared"):
        """Mean hinge triplet loss of a set of triplets and its gradient w.r.t. the trained parameters.

        Parameters
        ----------
        S : ndarray of float64, shape (n, d_in)
            Standardised inputs (:meth:`standardise`).
        anchor, positive, negative : ndarray of int, shape (t,)
            Row positions into ``S``; row i of the three forms triplet i.
        margin : float
        distance : {"squared", "euclidean"}

        Returns
        -------
        loss : float
        grads : dict of str -> ndarray
            One array per name of :attr:`trainable`, shaped like the parameter.

        Notes
        -----
        Only the rows that the triplets touch go through the head; a row in several triplets (or
        roles) gets the sum of its gradients before the chain rule runs through the layers.
        """
        t = anchor.shape[0]
        rows, inv = np.unique(np.concatenate([anchor, positive, negative]), return_inverse=True)
        Z, cache = self._forward(S[rows])
        loss, g_a, g_p, g_n = triplet_loss_grad(Z[inv[:t]], Z[inv[t:2 * t]], Z[inv[2 * t:]],
                                                margin=margin, distance=distance, reduction="mean")
        dZ = np.zeros_like(Z)
        np.add.at(dZ, inv, np.concatenate([g_a, g_p, g_n]))
        with np.errstate(over="ignore", invalid="ignore"):
            grads = self._backward(cache, dZ)
        _finite(grads.values(), "the projection head's gradients")
        return loss, grads

    # -- files -------------------------------------------------------------------------------
    def save(self, path, *, force=False):
        """Write the parameters to an ``.npz`` file (``np.savez``, no pickled objects), atomically.

        Parameters
        ----------
        path : str or Path
        force : bool, default False
            Replace an existing file.
        """
        with atomic_path(path, force=force) as tmp:
            # A file object, so that numpy does not append ".npz" to the temporary name.
            with open(tmp, "wb") as fh:
                np.savez(fh, format=np.array(_FORMAT), **self.params)
        return Path(path)

    @classmethod
    def load(cls, path):
        """Read a head written by :meth:`save` (``allow_pickle=False``)."""
        p = Path(path)
        if not p.is_file():
            raise TripletkitError(f"head file {str(p)!r} does not exist")
        try:
            with np.load(p, allow_pickle=False) as data:
                arrays = {k: data[k] for k in data.files}
        except (OSError, ValueError, EOFError) as exc:
            raise TripletkitError(f"cannot read head file {str(p)!r} as .npz ({str(exc).splitlines()[0]})") from None
        fmt = arrays.pop("format", None)
        if fmt is None or fmt.shape != () or str(fmt) != _FORMAT:
            raise TripletkitError(f"{str(p)!r} is not a tripletkit projection head (format {_FORMAT!r})")
        return cls(arrays)

    def __repr__(self):
        kind = "linear" if self.hidden == 0 else f"hidden={self.hidden}"
        return f"ProjectionHead(d_in={self.d_in}, dim={self.dim}, {kind})"


# ---------------------------------------------------------------------------------------------
# fitting
# ---------------------------------------------------------------------------------------------
def _mine_epoch(train, head, S, mining_config):
    """Mine triplets on the current head outputs of the training rows."""
    from .mining import mine  # imported here: the miner pulls in faiss

    emb = head._unit_outputs(head._forward(S)[0])
    with warnings.catch_warnings():
        # An empty epoch is recorded in the history and reported once by fit_head.
        warnings.filterwarnings("ignore", message="no triplet was mined", category=TripletkitWarning)
        return mine((train.ids, train.original_labels(), emb), None, config=mining_config, quiet=True,
                    return_triplets=True)


def describe_epoch(margin, record, epochs):
    """One line on an epoch of :func:`fit_head`: its loss, triplets, active share and timings.

    Parameters
    ----------
    margin : float
    record : dict
        One record of the history that :func:`fit_head` returns.
    epochs : int
        Epochs of the fit.

    Returns
    -------
    str
        ``margin 0.2 epoch 3/4: loss 0.0311 (after the epoch 0.0262), 5917 triplets, ...``
    """
    loss = "n/a" if record["loss"] is None else f"{record['loss']:.4f} (after the epoch {record['loss_after']:.4f})"
    active = record["active_fraction"]
    seconds = record["seconds"]
    return (f"margin {margin:g} epoch {record['epoch']}/{epochs}: loss {loss}, "
            f"{record['triplets']} triplets, active {'n/a' if active is None else f'{active:.3f}'} "
            f"(mining {seconds['mining']:.2f} s, gradient {seconds['gradient']:.2f} s, "
            f"update {seconds['update']:.2f} s)")


@contextlib.contextmanager
def _diverged_at(margin, epoch, head_config):
    """Turn :class:`HeadDiverged` into one line naming the margin, the epoch and what to change.

    Zero outputs before the first update come from the initialisation (its message stands); after
    an update they, like an overflow, mean that the steps were too large.
    """
    try:
        yield
    except HeadDiverged as exc:
        if not exc.overflow and epoch == 1:
            raise
        lr = head_config.learning_rate
        raise TripletkitError(
            f"the projection head diverged at margin {margin:g} in epoch {epoch} of {head_config.epochs}: {exc.what}; "
            f"lower [head] learning_rate (now {lr:g}, try {lr / 100:g})"
        ) from None


def _fit_epoch(head, S, train, optimizer, rng, mining_config, batch):
    """Mine on the head as it is, then step through the shuffled triplets in minibatches.

    Returns the epoch's record without its number (see :func:`fit_head`).
    """
    margin, distance = mining_config.margin, mining_config.distance
    t0 = time.perf_counter()
    summary = _mine_epoch(train, head, S, mining_config)
    t_mine = time.perf_counter() - t0
    triplets = summary.triplets
    anchors = np.asarray(triplets["anchor"], dtype=np.int64)
    positives = np.asarray(triplets["positive"], dtype=np.int64)
    negatives = np.asarray(triplets["negative"], dtype=np.int64)
    order = rng.permutation(anchors.shape[0])
    t_grad = t_upd = 0.0
    total, steps = 0.0, 0
    for start in range(0, order.shape[0], batch):
        sel = order[start:start + batch]
        t0 = time.perf_counter()
        loss, grads = head.loss_and_grad(S, anchors[sel], positives[sel], negatives[sel], margin, distance)
        t1 = time.perf_counter()
        with np.errstate(over="ignore", invalid="ignore"):
            optimizer.step(head.params, grads)
        _finite([head.params[k] for k in head.trainable], "the projection head's weights")
        t2 = time.perf_counter()
        t_grad += t1 - t0
        t_upd += t2 - t1
        total += loss * sel.shape[0]
        steps += 1
    count = anchors.shape[0]
    loss_after = None
    if count:
        # The same triplets, scored once more after the epoch's updates.
        Z = head._forward(S)[0]
        loss_after = float(np.mean(triplet_loss(Z[anchors], Z[positives], Z[negatives], margin=margin,
                                                distance=distance)))
    info = summary.to_dict()
    return {
        "loss": total / count if count else None,
        "loss_after": loss_after,
        "triplets": int(count),
        "steps": steps,
        "active_fraction": None if info.get("active_fraction") is None else float(info["active_fraction"]),
        "regimes": {r: int(info.get("regimes", {}).get(r, 0)) for r in REGIMES},
        "seconds": {"mining": t_mine, "gradient": t_grad, "update": t_upd},
    }


def fit_head(train_table, margin, head_config=None, mining_config=None, *, quiet=False, progress=None):
    """Fit a :class:`ProjectionHead` on frozen features with the triplet loss, re-mining every epoch.

    Parameters
    ----------
    train_table : EmbeddingTable, path, or (ids, labels, features) tuple
        Training feature vectors (rows are L2-normalised by the table) and their identities.
    margin : float
        The margin alpha (> 0) of both the miner (regime boundaries) and the hinge loss.
    head_config : HeadConfig, optional
        ``dim``, ``hidden``, ``epochs``, ``learning_rate``, ``batch_triplets``, ``optimizer``,
        ``momentum``, ``seed``. Defaults to ``HeadConfig()``.
    mining_config : MiningConfig, optional
        The miner's options (``regimes``, ``select``, ``distance``, ...); its ``margin`` is replaced
        by ``margin`` and its ``seed`` by ``seed + epoch``. Defaults to ``MiningConfig()``.
    quiet : bool, default False
        No per-epoch line on stderr.
    progress : callable, optional
        Called with each epoch's record (the dict described below) after the epoch; replaces the
        default stderr line.

    Returns
    -------
    head : ProjectionHead
    history : list of dict
        One record per epoch: ``epoch`` (1-based), ``loss`` (mean hinge loss of the epoch's
        minibatches, each measured before its update; None when nothing was mined), ``loss_after``
        (the mean hinge loss of the same triplets after the epoch's last update), ``triplets``
        and ``steps``, the miner's ``active_fraction`` and ``regimes`` counts on the head outputs at
        the start of the epoch, and ``seconds`` split into ``mining`` (embedding the training rows
        and mining), ``gradient`` (forward pass, loss gradient, back-propagation) and ``update``
        (the optimiser step).

    Notes
    -----
    Each epoch's triplets are mined once, on the head as it is at the start of the epoch (offline
    mining, as between epochs of a framework training loop), shuffled with the head's seed and cut
    into minibatches of ``batch_triplets``. An epoch that mines no triplet makes no update.
    """
    from .tables.embeddings import as_table

    head_config = HeadConfig() if head_config is None else head_config
    mining_config = MiningConfig() if mining_config is None else mining_config
    if not isinstance(head_config, HeadConfig):
        raise TripletkitError(f"head_config must be a HeadConfig, got {type(head_config).__name__}")
    if not isinstance(mining_config, MiningConfig):
        raise TripletkitError(f"mining_config must be a MiningConfig, got {type(mining_config).__name__}")
    if isinstance(margin, (bool, np.bool_)) or not isinstance(margin, (int, float, np.floating, np.integer)) \
            or not np.isfinite(margin) or margin <= 0:
        raise TripletkitError(f"margin must be a finite number > 0, got {margin!r}")
    margin = float(margin)
    check_margin(margin, mining_config.distance, "margin")
    train = as_table(train_table)
    if train.n_identities < 2:
        raise TripletkitError("the training table has fewer than 2 identities; a triplet needs a negative")
    rng = np.random.default_rng(head_config.seed)
    head = ProjectionHead.initialise(train.embeddings, dim=head_config.dim, hidden=head_config.hidden, seed=rng)
    S = head.standardise(train.embeddings)
    optimizer = make_optimizer(head_config.optimizer, head.params, head.trainable, head_config.learning_rate,
                               head_config.momentum)
    history = []
    for epoch in range(1, head_config.epochs + 1):
        with _diverged_at(margin, epoch, head_config):
            mining = dataclasses.replace(mining_config, margin=margin, seed=mining_config.seed + epoch)
            record = _fit_epoch(head, S, train, optimizer, rng, mining, head_config.batch_triplets)
            record = {"epoch": epoch, **record}
            history.append(record)
            if progress is not None:
                progress(record)
            else:
                say("head", describe_epoch(margin, record, head_config.epochs), quiet)
    empty = [rec["epoch"] for rec in history if rec["triplets"] == 0]
    if empty:
        warnings.warn(
            f"{len(empty)} of {len(history)} epochs mined no triplet in regimes {', '.join(mining_config.regimes)} "
            f"at margin {margin:g} (first: epoch {empty[0]}); they made no update",
            TripletkitWarning, stacklevel=2)
    return head, history

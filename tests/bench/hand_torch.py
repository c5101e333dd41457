"""Baseline: the same model and loop in PyTorch on the CPU, runs one after another.

``nn.Sequential`` of Linear/ReLU layers (Kaiming-normal weights for ReLU, zero biases),
``torch.optim.SGD(lr, momentum=μ)`` (``v ← μv + g; θ ← θ − ηv``, the same rule as the JAX
baseline and optax), cross-entropy; a Python loop over shuffled batches of tensors held in
memory, the losses read once per epoch, the validation rows scored each epoch under
``torch.no_grad``. Threads: PyTorch's default (one per core).

Usage: ``python hand_torch.py SPEC.toml`` — prints one JSON line like ``hand_jax.py``.
"""

import json
import sys
import time

import numpy as np

import workload as wl

t_start = time.perf_counter()
import torch  # noqa: E402
from torch import nn  # noqa: E402

w = wl.workload(sys.argv[1])
x_all, y_all = wl.arrays(w)
B = w["batch_size"]
steps = w["n_train"] // B


def model(seed):
    torch.manual_seed(seed)
    layers = []
    for fan_in, fan_out in zip(w["widths"][:-1], w["widths"][1:]):
        layer = nn.Linear(fan_in, fan_out)
        nn.init.kaiming_normal_(layer.weight, nonlinearity="relu")
        nn.init.zeros_(layer.bias)
        layers += [layer, nn.ReLU()]
    return nn.Sequential(*layers[:-1])


loss_fn = nn.CrossEntropyLoss()
finals, accuracies = [], []
for lr in w["learning_rates"]:
    for seed in w["seeds"]:
        x_tr, y_tr, x_va, y_va = wl.split(w, x_all, y_all, seed)
        x_tr, x_va = torch.from_numpy(x_tr), torch.from_numpy(x_va)
        y_tr, y_va = torch.from_numpy(y_tr).long(), torch.from_numpy(y_va).long()
        net = model(seed)
        opt = torch.optim.SGD(net.parameters(), lr=lr, momentum=w["momentum"])
        rng = np.random.default_rng(1000 + seed)
        for epoch in range(w["epochs"]):
            order = torch.from_numpy(rng.permutation(w["n_train"])[:steps * B].reshape(steps, B))
            losses = []
            for i in range(steps):
                idx = order[i]
                opt.zero_grad(set_to_none=True)
                loss = loss_fn(net(x_tr[idx]), y_tr[idx])
                loss.backward()
                opt.step()
                losses.append(loss.detach())
            train_loss = torch.stack(losses).mean().item()
            with torch.no_grad():
                z = net(x_va)
                val_loss, val_acc = loss_fn(z, y_va).item(), (z.argmax(1) == y_va).float().mean().item()
        finals.append(train_loss)
        accuracies.append(val_acc)

print(json.dumps({"way": "hand_torch", "final_train_loss": finals, "final_val_accuracy": accuracies,
                  "seconds_from_torch_import": time.perf_counter() - t_start}))

"""Baseline for the convolutional workload: the same model and loop in PyTorch on the CPU.

As :mod:`hand_torch` (``torch.optim.SGD(lr, momentum=μ)``, cross-entropy, a Python loop over
shuffled batches of tensors held in memory, the losses read once per epoch, the validation
images scored each epoch under ``torch.no_grad``, runs one after another, PyTorch's default
threads), with the model of :mod:`hand_jax_conv` for ``specs/conv.toml``: per block a 3 × 3
"same" convolution, ReLU and 2 × 2 max pooling, then the output layer; Kaiming-normal kernels
for ReLU (fan-in 9·channels), zero biases. The images are lesion's own ``glyphs`` draw, split and
standardized as :mod:`hand_jax_conv` does, moved to PyTorch's channels-first layout.

Usage: ``python hand_torch_conv.py SPEC.toml`` — prints one JSON line like :mod:`hand_jax_conv`.
"""

import json
import sys
import time
import tomllib

import numpy as np

t_start = time.perf_counter()
import torch  # noqa: E402
from torch import nn  # noqa: E402

from compiler.data import glyphs  # noqa: E402

spec = tomllib.loads(open(sys.argv[1]).read())
data, training = spec["data"], spec["training"]
shape, classes = tuple(data["shape"]), data["classes"]
x_all, y_all = glyphs(np.random.Generator(np.random.PCG64(data.get("seed", 0))), data["samples"], shape,
                      classes, data["noise"])
# [n, height, width, channels] → [n, channels, height, width], PyTorch's convolution layout
x_all, y_all = np.ascontiguousarray(x_all.astype(np.float32).transpose(0, 3, 1, 2)), y_all.astype(np.int64)
n_val = int(round(data["samples"] * data["validation"]))
n_train = data["samples"] - n_val
channels = [b["channels"] for b in spec["model"]["blocks"]]
B, momentum = training["batch_size"], spec["optimizer"]["momentum"]
steps = n_train // B
(axis,) = spec["ablation"]["axis"]
seeds = spec["study"]["seeds"]


def model(seed):
    torch.manual_seed(seed)
    layers, c_in, side = [], shape[-1], shape[0]
    for c in channels:
        conv = nn.Conv2d(c_in, c, 3, padding=1)
        nn.init.kaiming_normal_(conv.weight, nonlinearity="relu")
        nn.init.zeros_(conv.bias)
        layers += [conv, nn.ReLU(), nn.MaxPool2d(2)]
        c_in, side = c, side // 2
    # PyTorch flattens channels first; the dense layer's order of inputs does not change the model.
    out = nn.Linear(side * side * c_in, classes)
    nn.init.kaiming_normal_(out.weight, nonlinearity="relu")
    nn.init.zeros_(out.bias)
    return nn.Sequential(*layers, nn.Flatten(), out)


loss_fn = nn.CrossEntropyLoss()
finals, accuracies = [], []
for lr in axis["values"]:
    for seed in (range(seeds) if isinstance(seeds, int) else seeds):
        order = np.random.default_rng(seed).permutation(len(x_all))
        tr, va = order[:n_train], order[n_train:]
        mean, std = x_all[tr].mean(axis=0), x_all[tr].std(axis=0)
        std = np.where(std > 0, std, 1.0).astype(np.float32)
        x_tr, y_tr = torch.from_numpy((x_all[tr] - mean) / std), torch.from_numpy(y_all[tr])
        x_va, y_va = torch.from_numpy((x_all[va] - mean) / std), torch.from_numpy(y_all[va])
        net = model(seed)
        opt = torch.optim.SGD(net.parameters(), lr=lr, momentum=momentum)
        rng = np.random.default_rng(1000 + seed)
        for epoch in range(training["epochs"]):
            batches = torch.from_numpy(rng.permutation(n_train)[:steps * B].reshape(steps, B))
            losses = []
            for i in range(steps):
                idx = batches[i]
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

print(json.dumps({"way": "hand_torch_conv", "final_train_loss": finals, "final_val_accuracy": accuracies,
                  "seconds_from_torch_import": time.perf_counter() - t_start}))

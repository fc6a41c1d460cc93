#!/usr/bin/env python3
"""The flow of `tidemark bench` in PyTorch, for a side-by-side speed check.

Same architecture (ActNorm, fixed permutation, affine coupling with a
ReLU MLP conditioner of the given width and depth 2, soft clamp 3), same
initialisation scheme (uniform +-1/sqrt(fan_in), small random output layer),
same batch, same threads, standard-normal data, Adam. Prints one JSON line:
train and score vectors per second.
Usage: bench_pytorch.py DIM HIDDEN LAYERS BATCH THREADS SECONDS
"""
import json
import sys
import time

import torch

dim, hidden, layers, batch, threads = (int(a) for a in sys.argv[1:6])
seconds = float(sys.argv[6])
torch.set_num_threads(threads)
torch.manual_seed(7)
d1, d2, clamp = dim // 2, dim - dim // 2, 3.0


class Layer(torch.nn.Module):
    def __init__(self):
        super().__init__()
        self.log_scale = torch.nn.Parameter(torch.zeros(dim))
        self.bias = torch.nn.Parameter(torch.zeros(dim))
        self.register_buffer("perm", torch.randperm(dim))
        self.net = torch.nn.Sequential(
            torch.nn.Linear(d1, hidden), torch.nn.ReLU(),
            torch.nn.Linear(hidden, hidden), torch.nn.ReLU(),
            torch.nn.Linear(hidden, 2 * d2),
        )
        for lin in self.net[:-1]:
            if isinstance(lin, torch.nn.Linear):
                b = 1.0 / lin.in_features ** 0.5
                torch.nn.init.uniform_(lin.weight, -b, b)
                torch.nn.init.zeros_(lin.bias)
        torch.nn.init.uniform_(self.net[-1].weight, -0.01, 0.01)
        torch.nn.init.zeros_(self.net[-1].bias)

    def forward(self, x):
        a = x * self.log_scale.exp() + self.bias
        p = a[:, self.perm]
        p1, p2 = p[:, :d1], p[:, d1:]
        r, t = self.net(p1).chunk(2, dim=1)
        s = clamp * torch.tanh(r / clamp)
        return torch.cat([p1, p2 * s.exp() + t], dim=1), self.log_scale.sum() + s.sum(1)


model = torch.nn.ModuleList([Layer() for _ in range(layers)])
half_ln_2pi = 0.9189385332046727


def nll(x):
    logdet = torch.zeros(x.shape[0])
    for layer in model:
        x, ld = layer(x)
        logdet = logdet + ld
    return (0.5 * (x * x).sum(1) + dim * half_ln_2pi - logdet).mean()


data = torch.randn(batch * 8, dim)
opt = torch.optim.Adam(model.parameters(), lr=1e-4)
steps, start = 0, time.perf_counter()
while time.perf_counter() - start < seconds or steps < 3:
    x = data[(steps % 8) * batch:(steps % 8 + 1) * batch]
    opt.zero_grad(set_to_none=True)
    loss = nll(x)
    loss.backward()
    opt.step()
    steps += 1
train = steps * batch / (time.perf_counter() - start)

passes, start = 0, time.perf_counter()
with torch.no_grad():
    while time.perf_counter() - start < seconds or passes < 2:
        nll(data)
        passes += 1
score = passes * data.shape[0] / (time.perf_counter() - start)
print(json.dumps({"train_samples_per_s": train, "score_samples_per_s": score, "torch": torch.__version__}))
